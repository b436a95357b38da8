"""Collect the benchmark tables of experiments/benchmarks/results/ into docs/performance.md.

Usage:  python experiments/benchmarks/collect.py
"""

from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
RESULTS = ROOT / "experiments" / "benchmarks" / "results"
ORDER = ["build.md", "event-log.md", "simulate.md", "cp.md", "tucker.md", "evaluation.md", "evaluation-harness.md"]

INTRO = """# Performance

Every table below was written by a benchmark script under `experiments/benchmarks/`
(the command is beside each table), measured on this project's 2-core machine
while other work shared it. Each table has a reference measured in the same run
(a competing library, or a plain numpy or pyarrow operation of comparable work),
and contenders whose memory is compared each ran in their own process. The
absolute figures orient; the ratios are what count. Regenerate this page with
`python experiments/benchmarks/collect.py` after re-running a benchmark.
"""


TITLES = {"build.md": "Validating a log and building its tensor", "event-log.md": "Reading and validating event logs"}


def _section(name: str, text: str) -> str:
    """The result file with its headings shifted so that its top level is ``##``."""
    lines = text.splitlines()
    levels = [len(line) - len(line.lstrip("#")) for line in lines if line.startswith("#")]
    shift = 2 - min(levels) if levels else 1
    out = []
    for line in lines:
        if line.startswith("#"):
            level = len(line) - len(line.lstrip("#"))
            line = "#" * (level + shift) + line[level:]
        out.append(line)
    title = TITLES.get(name, name.removesuffix(".md").replace("-", " ").capitalize())
    if not levels or min(levels) + shift != 2 or not lines[0].startswith("#"):
        out = [f"## {title}", ""] + out
    return "\n".join(out)


def main() -> None:
    names = [n for n in ORDER if (RESULTS / n).exists()]
    names += sorted(p.name for p in RESULTS.glob("*.md") if p.name not in ORDER)
    parts = [INTRO]
    for name in names:
        parts.append(_section(name, (RESULTS / name).read_text().strip()))
    (ROOT / "docs" / "performance.md").write_text("\n\n".join(parts) + "\n")
    print(f"docs/performance.md: {len(names)} result files")


if __name__ == "__main__":
    main()
