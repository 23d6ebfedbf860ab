"""schedforge: design and verify quantum-annealing schedules with flat ends.

The public API is re-exported here; see DEVELOPERS.md for the module map.

>>> import schedforge as sf
>>> spec = sf.load_spec("builtin:driven-qubit")                  # doctest: +SKIP
>>> system = sf.System.from_spec(spec)                           # doctest: +SKIP
>>> schedule = sf.make_schedule("beta", k_start=0, k_end=2)      # doctest: +SKIP
>>> sf.simulate(system, schedule, tf_ns=1e4)                     # doctest: +SKIP

Names are imported from their modules on first use, so ``import schedforge``
itself stays fast (it loads neither NumPy nor SciPy).
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

__version__ = "0.1.0"

#: Public name -> the module (under ``schedforge``) that defines it.
_EXPORTS: dict[str, str] = {
    # the study spec: reading, validating, the model
    "load_spec": "spec",
    "parse_spec": "spec",
    "builtin_scenarios": "spec",
    "Spec": "spec_model",
    "DeviceSpec": "spec_model",
    "ProblemSpec": "spec_model",
    "BathSpec": "spec_model",
    "ScheduleSpec": "spec_model",
    "InitialSpec": "spec_model",
    "NumericsSpec": "spec_model",
    "SweepSpec": "spec_model",
    "WaveformSpec": "spec_model",
    "NoiseSpec": "spec_model",
    "InputError": "errors",
    # the system
    "System": "system",
    "AnnealingHamiltonian": "hamiltonian",
    "make_device_curves": "device",
    "make_bath": "bath",
    # simulation
    "simulate": "dynamics",
    "simulate_spec": "dynamics",
    "SimulationResult": "dynamics",
    # schedules
    "Schedule": "schedules",
    "FAMILIES": "schedules",
    "make_schedule": "schedules",
    "schedule_from_spec": "schedules",
    # sweeps
    "SweepPoint": "sweep",
    "SweepOutcome": "sweep",
    "sweep_points": "sweep",
    "run_sweep": "sweep",
    "make_executor": "executors",
    # fits, predictions, budgets
    "ScalingFit": "analysis",
    "fit_scaling": "analysis",
    "Prediction": "prediction",
    "predicted_coefficient": "prediction",
    "BudgetPlan": "budget",
    "plan_budget": "budget",
    # waveforms and samples
    "RealizedWaveform": "waveform",
    "realize": "waveform",
    "played_samples": "waveform",
    "design_breakpoints": "breakpoints",
    "sample_schedule": "samples",
    "write_samples_csv": "samples",
}

__all__ = [
    "FAMILIES",
    "AnnealingHamiltonian",
    "BathSpec",
    "BudgetPlan",
    "DeviceSpec",
    "InitialSpec",
    "InputError",
    "NoiseSpec",
    "NumericsSpec",
    "Prediction",
    "ProblemSpec",
    "RealizedWaveform",
    "ScalingFit",
    "Schedule",
    "ScheduleSpec",
    "SimulationResult",
    "Spec",
    "SweepOutcome",
    "SweepPoint",
    "SweepSpec",
    "System",
    "WaveformSpec",
    "__version__",
    "builtin_scenarios",
    "design_breakpoints",
    "fit_scaling",
    "load_spec",
    "make_bath",
    "make_device_curves",
    "make_executor",
    "make_schedule",
    "parse_spec",
    "plan_budget",
    "played_samples",
    "predicted_coefficient",
    "realize",
    "run_sweep",
    "sample_schedule",
    "schedule_from_spec",
    "simulate",
    "simulate_spec",
    "sweep_points",
    "write_samples_csv",
]

if TYPE_CHECKING:  # what static checkers and editors see; at run time, __getattr__
    from .analysis import ScalingFit, fit_scaling
    from .bath import make_bath
    from .breakpoints import design_breakpoints
    from .budget import BudgetPlan, plan_budget
    from .device import make_device_curves
    from .dynamics import SimulationResult, simulate, simulate_spec
    from .errors import InputError
    from .executors import make_executor
    from .hamiltonian import AnnealingHamiltonian
    from .prediction import Prediction, predicted_coefficient
    from .samples import sample_schedule, write_samples_csv
    from .schedules import FAMILIES, Schedule, make_schedule, schedule_from_spec
    from .spec import builtin_scenarios, load_spec, parse_spec
    from .spec_model import (
        BathSpec,
        DeviceSpec,
        InitialSpec,
        NoiseSpec,
        NumericsSpec,
        ProblemSpec,
        ScheduleSpec,
        Spec,
        SweepSpec,
        WaveformSpec,
    )
    from .sweep import SweepOutcome, SweepPoint, run_sweep, sweep_points
    from .system import System
    from .waveform import RealizedWaveform, played_samples, realize


def __getattr__(name: str) -> Any:
    """Import a public name from its module on first use (PEP 562)."""
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{module}", __name__), name)
    globals()[name] = value  # later lookups skip this function
    return value


def __dir__() -> list[str]:
    return sorted({*globals(), *_EXPORTS})
