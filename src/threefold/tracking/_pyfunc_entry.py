"""Models-from-code entry of threefold's MLflow pyfunc model: MLflow runs this file on load.

Nothing is unpickled: the model is built by code, and its state is read from the
checksummed model folder logged as the ``model`` artifact (see
:mod:`threefold.tracking.pyfunc`).
"""

from mlflow.models import set_model

from threefold.tracking.pyfunc import RecommenderPyfunc

set_model(RecommenderPyfunc())
