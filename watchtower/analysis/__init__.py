"""Pure numpy analysis of a window of steps: no I/O, no sockets, no widgets.

Every figure is computed here, once; ``HOW`` says how and from which source. Start at ``analyse``.
"""

from watchtower.analysis.aggregate import COMM_BOUND_THRESHOLD, LayerStats, WindowSums, layer_stats, reduce_window
from watchtower.analysis.cusum import Alert, Cusum, degradation_alerts, tabular_cusum, warmup_reference
from watchtower.analysis.efficiency import (
    Efficiency,
    SerialFraction,
    Speedup,
    Straggler,
    find_stragglers,
    karp_flatt,
    pop_efficiency,
    serial_fractions,
)
from watchtower.analysis.links import SLOW_FRACTION, LinkStats, link_stats
from watchtower.analysis.models import (
    StepModel,
    allreduce,
    binomial_tree,
    collective_cost,
    eta_s,
    halo_exchange,
    rabenseifner_allreduce,
    recursive_doubling_allreduce,
    remaining_steps,
    ring_allgather,
    ring_allreduce,
    scatter_tree,
    step_model,
)
from watchtower.analysis.ports import PortStats, name_alert_ports, port_stats
from watchtower.analysis.robust import HockneyFit, fit_hockney, hockney_lstsq, modified_z
from watchtower.analysis.sharing import bottleneck_share, busy_level, port_load
from watchtower.analysis.summary import HOW, Analysis, WhatIf, analyse, analysis_to_json, compare
from watchtower.analysis.window import Collectives, RunSeries, Transfers, Window

__all__ = [
    "COMM_BOUND_THRESHOLD", "HOW", "SLOW_FRACTION", "Alert", "Analysis", "Collectives", "Cusum", "Efficiency",
    "HockneyFit", "LayerStats", "LinkStats", "PortStats", "RunSeries", "SerialFraction", "Speedup", "StepModel",
    "Straggler", "Transfers", "WhatIf", "Window", "WindowSums", "allreduce", "analyse", "analysis_to_json",
    "binomial_tree", "bottleneck_share", "busy_level", "collective_cost", "compare", "degradation_alerts", "eta_s",
    "find_stragglers", "fit_hockney", "halo_exchange", "hockney_lstsq", "karp_flatt", "layer_stats", "link_stats",
    "modified_z", "name_alert_ports", "pop_efficiency", "port_load", "port_stats", "rabenseifner_allreduce",
    "recursive_doubling_allreduce", "reduce_window", "remaining_steps", "ring_allgather", "ring_allreduce",
    "scatter_tree", "serial_fractions", "step_model", "tabular_cusum", "warmup_reference",
]
