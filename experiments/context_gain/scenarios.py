"""The invented scenarios of the context-gain study (planted effects stated; log-odds units).

* ``quillfen``: the demo site, *The Quillfen Courier*, as ``threefold demo`` simulates it
  (4 dayparts, 3 devices, 3 tones): 85% of readers with a daypart persona of strength 2.5,
  audio on mobile in the morning +3.0, long clips in the evening +2.5, tone match +2.0.
* ``quillfen-medium``: the same site with 60% personas of strength 2.0, +2.5, +2.0, +1.5.
* ``quillfen-mild``: the same site with the effects it had before the study: 35% personas of
  strength 1.0, +1.2, +1.0, +0.6.
* ``brackenridge``: *Brackenridge Evening Post*, a second invented site with other labels and
  mode sizes (6 dayparts, 4 devices, 4 tones) and strong three-way effects: 85% of readers
  with a daypart persona of strength 2.5, audio on phones in the morning commute +3.0,
  long clips in the late evening +2.5, tone match +2.0.
* ``flat``: the demo site with every planted context effect set to zero (no persona, no
  boosts, no tone match, no jitter): context does not matter.
"""

from __future__ import annotations

from threefold.demo.simulate import ScenarioParameters

SCENARIOS = {
    "quillfen": {},
    "brackenridge": dict(
        site_name="Brackenridge Evening Post", timezone="America/Chicago", start="2026-04-06T00:00:00",
        topics=("council", "river", "schools", "farms", "arts", "teams", "weather", "roads"),
        tones=("somber", "plain", "warm", "playful"), tone_shares=(0.25, 0.35, 0.25, 0.15),
        devices=("mobile", "desktop", "tablet", "tv"), device_shares=(0.5, 0.25, 0.15, 0.1),
        daypart_labels=("dawn", "morning", "midday", "afternoon", "evening", "night"),
        daypart_starts=(5, 7, 11, 14, 18, 22), daypart_shares=(0.08, 0.2, 0.2, 0.17, 0.25, 0.1),
        shifter_share=0.85, shift_strength=2.5, audio_commute_boost=3.0, long_clip_evening_boost=2.5,
        tone_match=2.0,
    ),
    "quillfen-medium": dict(shifter_share=0.6, shift_strength=2.0, audio_commute_boost=2.5,
                            long_clip_evening_boost=2.0, tone_match=1.5),
    "quillfen-mild": dict(shifter_share=0.35, shift_strength=1.0, audio_commute_boost=1.2,
                          long_clip_evening_boost=1.0, tone_match=0.6),
    "flat": dict(shifter_share=0.0, shift_strength=0.0, audio_commute_boost=0.0, long_clip_evening_boost=0.0,
                 tone_match=0.0, context_jitter_sd=0.0),
}


def scenario(name: str, n_events: int, seed: int) -> ScenarioParameters:
    """The parameters of a named scenario at a size and seed."""
    return ScenarioParameters.scaled(n_events, seed=seed, **SCENARIOS[name])
