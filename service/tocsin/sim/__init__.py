"""Network simulator: invented sites, Poisson background, injected signals, recordings.

The flow is :func:`build_scenario` (registry + per-site parameters) ->
:func:`simulate` (background per site, injections, arrival times) ->
:func:`write_recording` and :func:`write_truth`. ``tocsin simulate`` is the
command-line face of it. Modules, one concept each:

* :mod:`~tocsin.sim.network` — the shipped 40-site scenario;
* :mod:`~tocsin.sim.scenario` — per-site simulation parameters (rates, drift,
  dead time, batching, delays) and the seeding of every random stream;
* :mod:`~tocsin.sim.background` — live batches with dead time and Poisson hits;
* :mod:`~tocsin.sim.arrival` — arrival times and order;
* :mod:`~tocsin.sim.injspec` / :mod:`~tocsin.sim.inject` — the ``--inject``
  language, plane fronts and bursts;
* :mod:`~tocsin.sim.simulation` / :mod:`~tocsin.sim.output` — running and writing.
"""

from tocsin.sim.background import SiteStream
from tocsin.sim.injspec import INJECT_SYNTAX, BurstSpec, FrontSpec, InjectionSpec, parse_injection
from tocsin.sim.network import SHIPPED_RATES_HZ, SHIPPED_SITES, shipped_registry
from tocsin.sim.output import truth_path_for, truth_record, write_recording, write_truth
from tocsin.sim.scenario import Scenario, SiteSim, build_scenario, derive_site_sim
from tocsin.sim.simulation import Simulation, iter_batches, simulate

__all__ = [
    "INJECT_SYNTAX",
    "SHIPPED_RATES_HZ",
    "SHIPPED_SITES",
    "BurstSpec",
    "FrontSpec",
    "InjectionSpec",
    "Scenario",
    "Simulation",
    "SiteSim",
    "SiteStream",
    "build_scenario",
    "derive_site_sim",
    "iter_batches",
    "parse_injection",
    "shipped_registry",
    "simulate",
    "truth_path_for",
    "truth_record",
    "write_recording",
    "write_truth",
]
