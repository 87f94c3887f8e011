"""DUT models of the simulated bench, registered by name and loadable from YAML.

``load_dut("wien")`` builds a model with its (invented) default values;
``load_dut("wien", gain=3.2)`` overrides some; ``load_dut("path/to/file.yaml")`` reads a
DUT file whose ``model:`` key names the model and whose other keys are its parameters.
Every bad value ends in :class:`loopwright.errors.InputError` naming file, line and field.
"""

from __future__ import annotations

import importlib
import pkgutil
from pathlib import Path
from typing import Any, TypeVar

import numpy as np

from loopwright.errors import InputError
from loopwright.yamlfile import YamlSource, load_yaml, validate
from mock_instruments.duts.base import DUTModel, DUTParams, LoopSystem

#: Registered DUT model classes by name.
DUTS: dict[str, type[DUTModel]] = {}

ModelT = TypeVar("ModelT", bound=type[DUTModel])


def register_dut(cls: ModelT) -> ModelT:
    """Class decorator: register a :class:`DUTModel` subclass under ``cls.name``."""
    if not cls.name:
        raise ValueError(f"{cls.__name__} has no name")
    if cls.name in DUTS and DUTS[cls.name] is not cls:
        raise ValueError(f"a DUT model named {cls.name!r} is already registered")
    DUTS[cls.name] = cls
    return cls


def _known() -> str:
    return ", ".join(sorted(DUTS))


def _from_source(source: YamlSource, overrides: dict[str, Any]) -> DUTModel:
    data = source.data
    if not isinstance(data, dict):
        raise source.error((), "a DUT file is a mapping with a 'model:' key and parameters")
    name = data.get("model")
    if name is None:
        raise InputError(f"required field is missing (one of: {_known()})",
                         path=source.path, line=source.line_of(()), field="model")
    if not isinstance(name, str) or name not in DUTS:
        raise source.error(("model",), f"unknown DUT model {name!r}; known: {_known()}")
    cls = DUTS[name]
    if overrides:
        source = YamlSource(source.path, {**data, **overrides}, source.lines)
    params = validate(cls.Params, source)
    return _build(cls, params, source)


#: Fastest rate (rad/s) of a DUT's poles, open or closed loop: far above any bench, and
#: far from where the simulator's time steps would underflow.
MAX_RATE_RAD_S = 2 * np.pi * 1e12


def _check_computable(model: DUTModel) -> None:
    """Refuse parameters (each valid alone) that give no computable circuit.

    Raises
    ------
    ValueError
        A realisation holds NaN or infinity, or a pole is faster than
        :data:`MAX_RATE_RAD_S` (e.g. 1e-300 H, or a gain of 1e300).
    """
    try:
        loop = model.loop_system()
        ch1, ch2 = model.probe_transfer_functions()
        systems = (("channel 1", ch1.realise()), ("channel 2", ch2.realise()),
                   ("loop", loop.network))
    except (np.linalg.LinAlgError, ArithmeticError) as exc:
        raise ValueError(f"these values give no computable circuit ({exc});"
                         " use values of a real circuit") from exc
    net = loop.network
    for name, system in systems:
        arrays = (system.A, system.B, system.C, np.atleast_1d(system.D))
        if not all(np.all(np.isfinite(a)) for a in arrays):
            raise ValueError(f"these values give the {name} response infinite or undefined"
                             " coefficients; use values of a real circuit")
        if system.A.size and np.max(np.abs(np.linalg.eigvals(system.A))) > MAX_RATE_RAD_S:
            raise ValueError(f"these values put a pole of the {name} response above"
                             f" {MAX_RATE_RAD_S / (2 * np.pi):g} Hz")
    if net.A.size:
        closed = net.A + float(loop.gain) * np.outer(net.B, net.C)
        rates = np.abs(np.linalg.eigvals(closed))
        if not np.all(np.isfinite(rates)) or np.max(rates) > MAX_RATE_RAD_S:
            raise ValueError("these values put a closed-loop pole above"
                             f" {MAX_RATE_RAD_S / (2 * np.pi):g} Hz or make it undefined")


def _build(cls: type[DUTModel], params: DUTParams, source: YamlSource) -> DUTModel:
    try:
        model = cls(params)
        _check_computable(model)
        return model
    except (ValueError, ArithmeticError) as exc:
        # Cross-field problems found while building the circuit (e.g. an unstable
        # polynomial form); the model names the field in its message.
        field = getattr(exc, "field", None)
        loc = (field,) if field else ()
        raise source.error(loc, str(exc)) from exc


def load_dut(name_or_path: str | Path, **overrides: Any) -> DUTModel:
    """Build a DUT model from a registered name or a DUT YAML file.

    Parameters
    ----------
    name_or_path
        A name from :data:`DUTS` or the path of a DUT file (``model: <name>`` plus
        parameters).
    **overrides
        Parameter values that replace the defaults or the file's values.

    Returns
    -------
    DUTModel

    Raises
    ------
    InputError
        Unknown model, unreadable file, unknown key or bad value (with file:line:field).
    """
    _load_models()
    text = str(name_or_path)
    if text in DUTS and not Path(text).exists():
        source = YamlSource(f"<dut {text}>", {"model": text, **overrides}, {})
        return _from_source(source, {})
    path = Path(text)
    if not path.exists() and path.suffix not in (".yaml", ".yml"):
        raise InputError(f"no DUT model or file named {text!r}; models: {_known()}")
    return _from_source(load_yaml(path), overrides)


def _load_models() -> None:
    """Import every model module of this package (each registers its models)."""
    for info in pkgutil.iter_modules(__path__):
        if info.name != "base":
            importlib.import_module(f"{__name__}.{info.name}")


def model_list() -> list[tuple[str, str]]:
    """``(name, one-line description)`` of every registered model, sorted by name."""
    _load_models()
    return [(name, DUTS[name].description) for name in sorted(DUTS)]


__all__ = ["DUTS", "DUTModel", "DUTParams", "LoopSystem", "load_dut",
           "model_list", "register_dut"]


# Register the shipped models now, so that DUTS is complete on import.
_load_models()
