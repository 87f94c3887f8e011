"""loopwright.procedure: procedure and bench files, frequency plans (the runner builds on them).

Import from here::

    from loopwright.procedure import load_procedure, load_bench, check_against_bench
    from loopwright.procedure import frequency_plan, amplitude_at, refine_points
"""

from loopwright.procedure.plan import (
    RecordSettings,
    amplitude_at,
    frequency_plan,
    planned_count,
    record_settings,
    refine_points,
    settle_time_s,
)
from loopwright.procedure.schema import (
    FIGURES,
    STEP_KINDS,
    AmplitudePoint,
    Bench,
    CalibrateStep,
    ChannelMap,
    ClosedLoopStep,
    InstrumentEntry,
    Limit,
    ProbeAttenuation,
    Procedure,
    PromptStep,
    RefineSettings,
    SimulatedBenchEntry,
    SweepStep,
    check_against_bench,
    evaluate_limits,
    figure_value,
    load_bench,
    load_procedure,
    loads_bench,
    loads_procedure,
)

__all__ = [
    "FIGURES",
    "STEP_KINDS",
    "AmplitudePoint",
    "Bench",
    "CalibrateStep",
    "ChannelMap",
    "ClosedLoopStep",
    "InstrumentEntry",
    "Limit",
    "ProbeAttenuation",
    "Procedure",
    "PromptStep",
    "RecordSettings",
    "RefineSettings",
    "SimulatedBenchEntry",
    "SweepStep",
    "amplitude_at",
    "check_against_bench",
    "evaluate_limits",
    "figure_value",
    "frequency_plan",
    "load_bench",
    "load_procedure",
    "loads_bench",
    "loads_procedure",
    "planned_count",
    "record_settings",
    "refine_points",
    "settle_time_s",
]
