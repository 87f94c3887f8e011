"""Driver files: loading, finding, matching by ``*IDN?``, and opening an instrument.

Driver files are read from, in this order (the first file of a name wins):

1. folders given by the caller (``--drivers DIR`` on the command line),
2. folders in the environment variable :data:`DRIVERS_ENV` (``os.pathsep``-separated),
3. the shipped ``drivers/`` folder (:func:`loopwright.resources.data_dir`), which an
   installed wheel carries too.

A driver whose dialect templates cannot express is a Python class: the file's
``python`` key names it as ``module:Class`` or by a name registered with
:func:`driver_class`. The class is built as ``cls(session, spec, caps=caps)`` and
implements the role (usually by subclassing a template class of
:mod:`loopwright.instruments.template_roles` and overriding one method).
"""

from __future__ import annotations

import importlib
import os
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Any

from pyvisa.highlevel import VisaLibraryBase

from loopwright.errors import DriverError, InputError
from loopwright.instruments.driver_schema import (
    NON_NUMERIC,
    REQUIRED_LIMITS,
    ROLE_MODELS,
    DriverSpec,
    template_fields,
)
from loopwright.instruments.session import Session, TrafficLog
from loopwright.instruments.template_roles import (
    GeneratorCaps,
    TemplateGenerator,
    TemplateScope,
    TemplateSwitch,
)
from loopwright.resources import data_dir
from loopwright.yamlfile import YamlSource, load_yaml, validate

#: Environment variable with extra driver folders, separated by ``os.pathsep``.
DRIVERS_ENV = "LOOPWRIGHT_DRIVERS"
#: Roles a driver can serve.
ROLES = ("generator", "scope", "switch")
#: The template implementation of each role.
TEMPLATE_CLASSES: dict[str, type] = {
    "generator": TemplateGenerator, "scope": TemplateScope, "switch": TemplateSwitch}
#: Python driver classes registered by name with :func:`driver_class`.
DRIVER_CLASSES: dict[str, type] = {}


@dataclass(frozen=True)
class LoadedDriver:
    """A validated driver file."""

    spec: DriverSpec
    path: Path

    @property
    def name(self) -> str:
        """The driver's name."""
        return self.spec.name

    @property
    def role(self) -> str:
        """generator, scope or switch."""
        return self.spec.role


def driver_class(name: str) -> Callable[[type], type]:
    """Register a Python driver class under ``name`` (for a file's ``python: name``).

    Examples
    --------
    >>> @driver_class("my-odd-generator")          # doctest: +SKIP
    ... class OddGenerator(TemplateGenerator):
    ...     def set_frequency(self, frequency_hz): ...
    """
    def register(cls: type) -> type:
        DRIVER_CLASSES[name] = cls
        return cls
    return register


def _cross_check(spec: DriverSpec, source: YamlSource) -> None:
    """Checks across keys, with the line of the offending key."""
    for name in REQUIRED_LIMITS[spec.role]:
        entry = spec.values.get(name)
        if entry is None:
            raise source.error(("values",), f"{name!r} needs an entry with min and max")
        for bound in ("min", "max"):
            if getattr(entry, bound) is None:
                raise source.error(("values", name), f"{bound} is required for {name}")
    commands = getattr(spec, "commands", None)
    if commands is None:
        return
    for op in type(commands).model_fields:
        templates = getattr(commands, op) or []  # an optional operation left out
        for index, template in enumerate(templates):
            for field in template_fields(template):
                if field not in NON_NUMERIC and field not in spec.values:
                    raise source.error(
                        ("commands", op, index),
                        f"{{{field}}} is sent as a number: give it limits under"
                        f" 'values: {field}:'")


def load_driver(path: str | Path) -> LoadedDriver:
    """Read and validate one driver file.

    Raises
    ------
    InputError
        The file is not a valid driver: names file, line and field.
    """
    source = load_yaml(path)
    if not isinstance(source.data, dict):
        raise source.error((), "a driver file is a mapping of keys (name, role, ...)")
    role = source.data.get("role")
    if not isinstance(role, str) or role not in ROLE_MODELS:
        raise source.error(("role",), f"role must be one of {', '.join(ROLES)} (got {role!r})")
    spec = validate(ROLE_MODELS[role], source)
    _cross_check(spec, source)  # type: ignore[arg-type]
    return LoadedDriver(spec=spec, path=Path(path))  # type: ignore[arg-type]


def driver_dirs(extra_dirs: Iterable[str | Path] = ()) -> list[Path]:
    """The folders searched for driver files, first match first."""
    dirs = [Path(d) for d in extra_dirs]
    env = os.environ.get(DRIVERS_ENV, "")
    dirs += [Path(d) for d in env.split(os.pathsep) if d.strip()]
    dirs.append(data_dir("drivers"))
    return dirs


def find_drivers(extra_dirs: Iterable[str | Path] = (), role: str | None = None
                 ) -> list[LoadedDriver]:
    """Every driver in the search folders (the first file of each name).

    Raises
    ------
    InputError
        A driver file is invalid, or a given folder does not exist.
    """
    seen: dict[str, LoadedDriver] = {}
    for folder in driver_dirs(extra_dirs):
        if not folder.is_dir():
            what = "is a file, not a folder" if folder.exists() else "does not exist"
            raise InputError(f"driver folder {str(folder)!r} {what}")
        here: dict[str, Path] = {}
        for path in sorted(folder.glob("*.yaml")):
            loaded = load_driver(path)
            if loaded.name in here:
                raise InputError(f"driver name {loaded.name!r} is also used by"
                                 f" {here[loaded.name]}", path=path, field="name")
            here[loaded.name] = path
            seen.setdefault(loaded.name, loaded)
    found = list(seen.values())
    return [d for d in found if role is None or d.role == role]


def get_driver(name_or_path: str | Path, extra_dirs: Iterable[str | Path] = ()
               ) -> LoadedDriver:
    """A driver by name, or by the path of a ``.yaml`` file.

    Raises
    ------
    DriverError
        No driver of that name.
    """
    text = str(name_or_path)
    if text.endswith((".yaml", ".yml")) or os.sep in text:
        return load_driver(text)
    drivers = find_drivers(extra_dirs)
    for loaded in drivers:
        if loaded.name == text:
            return loaded
    names = ", ".join(sorted(d.name for d in drivers))
    raise DriverError(f"no driver named {text!r}; known drivers: {names}")


def match_driver(identity: str, role: str, extra_dirs: Iterable[str | Path] = ()
                 ) -> LoadedDriver:
    """The first driver of ``role`` whose match rule fits ``identity``.

    Raises
    ------
    DriverError
        No driver matches: the message lists those of the role.
    """
    candidates = find_drivers(extra_dirs, role=role)
    for loaded in candidates:
        if loaded.spec.match.matches(identity):
            return loaded
    names = ", ".join(d.name for d in candidates) or "none"
    raise DriverError(
        f"no {role} driver matches the identity {identity!r} (drivers of that role:"
        f" {names}); name one with driver=NAME (--driver), or add a driver file whose"
        f" 'match: idn:' fits (see drivers/ and {DRIVERS_ENV})")


def resolve_class(spec: DriverSpec) -> type:
    """The class that implements ``spec``: its ``python`` class, or the template one.

    Raises
    ------
    DriverError
        The named module, class or registered name does not exist.
    """
    if spec.python is None:
        return TEMPLATE_CLASSES[spec.role]
    if ":" not in spec.python:
        try:
            return DRIVER_CLASSES[spec.python]
        except KeyError:
            known = ", ".join(sorted(DRIVER_CLASSES)) or "none"
            raise DriverError(f"driver {spec.name!r}: no driver class registered as"
                              f" {spec.python!r} (registered: {known}); import the module"
                              " that registers it, or write python: module:Class") from None
    module_name, _, class_name = spec.python.partition(":")
    try:
        module = importlib.import_module(module_name)
    except ImportError as exc:
        raise DriverError(f"driver {spec.name!r}: cannot import {module_name!r}: {exc}"
                          ) from exc
    try:
        found = getattr(module, class_name)
    except AttributeError:
        raise DriverError(f"driver {spec.name!r}: module {module_name!r} has no"
                          f" {class_name!r}") from None
    if not isinstance(found, type):
        raise DriverError(f"driver {spec.name!r}: {spec.python!r} is not a class (a driver"
                          " class subclasses TemplateGenerator, TemplateScope or"
                          " TemplateSwitch)")
    return found


def open_instrument(resource: str, role: str, driver: str | Path | None = None,
                    backend: str | VisaLibraryBase = "@py", timeout_s: float = 5.0,
                    traffic_log: TrafficLog | str | Path | IO[str] | None = None,
                    extra_driver_dirs: Sequence[str | Path] = (),
                    caps: GeneratorCaps | None = None) -> Any:
    """Open ``resource``, ask ``*IDN?``, pick its driver and return the role object.

    Parameters
    ----------
    resource
        VISA resource string, e.g. ``TCPIP0::127.0.0.1::5025::SOCKET``.
    role
        ``generator``, ``scope`` or ``switch``.
    driver
        A driver name or a driver file path; None picks the first driver of the role
        whose ``match: idn:`` fits the identity.
    backend
        pyvisa backend string or ``VisaLibraryBase`` instance.
    timeout_s
        Read timeout in seconds.
    traffic_log
        SCPI traffic log (path, text file or :class:`TrafficLog`), or None.
    extra_driver_dirs
        Folders searched before ``$LOOPWRIGHT_DRIVERS`` and the shipped drivers.
    caps
        Bench caps a generator enforces (:class:`SafetyError` before sending).

    Returns
    -------
    TemplateGenerator | TemplateScope | TemplateSwitch | driver class instance
        Implements the role; has ``.identity``, ``.driver_name``, ``.session``.

    Raises
    ------
    ConnectionLost, InstrumentTimeout
        Nothing answers ``*IDN?`` at the resource.
    DriverError
        No driver fits, the named driver is of another role, or its init failed.
    SCPIError
        The instrument refused a command of the init sequence.
    """
    if role not in ROLES:
        raise DriverError(f"unknown role {role!r}; use one of {', '.join(ROLES)}")
    session = Session(resource, backend=backend, timeout_s=timeout_s, traffic_log=traffic_log)
    try:
        if driver is not None:
            loaded = get_driver(driver, extra_driver_dirs)
        else:
            loaded = match_driver(session.identity, role, extra_driver_dirs)
        if loaded.role != role:
            raise DriverError(f"driver {loaded.name!r} is a {loaded.role} driver, not a {role}")
        session.error_query = loaded.spec.error_query
        cls = resolve_class(loaded.spec)
        instrument = cls(session, loaded.spec, caps=caps)
        instrument.driver_path = loaded.path
        return instrument
    except BaseException:
        session.close()
        raise
