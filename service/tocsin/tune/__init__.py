"""Tuning from recordings: time-slide backgrounds, injection efficiency, recommended thresholds.

``tocsin tune`` (:mod:`tocsin.cli.tune`) drives it. Modules, one concept each:

* :mod:`~tocsin.tune.recorded` — a recording in compact arrays, each site's live time;
* :mod:`~tocsin.tune.slides` — time slides within each site's live time, checked exactly;
* :mod:`~tocsin.tune.injections` — plane fronts and bursts added, and matched to candidates;
* :mod:`~tocsin.tune.runner` — replays through the pipeline on several processes;
* :mod:`~tocsin.tune.far` — measured against analytic false alarm rate;
* :mod:`~tocsin.tune.recommend` — thresholds for a target rate, as a config snippet;
* :mod:`~tocsin.tune.study` — the whole study; :mod:`~tocsin.tune.plots` and
  :mod:`~tocsin.tune.report` — the static HTML report.
"""

from tocsin.tune.injections import InjectionSettings
from tocsin.tune.recorded import RecordedNetwork, load_recording
from tocsin.tune.runner import Interrupted
from tocsin.tune.study import StudyOptions, StudyResult, run_study

__all__ = [
    "InjectionSettings",
    "Interrupted",
    "RecordedNetwork",
    "StudyOptions",
    "StudyResult",
    "load_recording",
    "run_study",
]
