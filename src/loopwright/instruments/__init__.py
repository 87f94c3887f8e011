"""loopwright.instruments: VISA sessions, IEEE 488.2 blocks, declarative drivers, roles.

The public entry point is :func:`open_instrument`::

    gen = open_instrument("TCPIP0::127.0.0.1::5025::SOCKET", "generator")
    gen.set_sine(1000.0, 0.5)
    gen.set_output(True)
    ...
    gen.close()            # output off, teardown, session closed
"""

from loopwright.instruments.block import (
    BlockFormatError,
    decode_block,
    decode_samples,
    encode_block,
    encode_samples,
    read_block,
)
from loopwright.instruments.driver import (
    DRIVERS_ENV,
    LoadedDriver,
    driver_class,
    driver_dirs,
    find_drivers,
    get_driver,
    load_driver,
    match_driver,
    open_instrument,
)
from loopwright.instruments.roles import (
    Capture,
    ChannelSettings,
    Generator,
    GeneratorSettings,
    LoopSwitch,
    ProbeSwitch,
    Scope,
)
from loopwright.instruments.session import Session, TrafficLog
from loopwright.instruments.template_roles import (
    GeneratorCaps,
    TemplateGenerator,
    TemplateScope,
    TemplateSwitch,
)

__all__ = [
    "DRIVERS_ENV",
    "BlockFormatError",
    "Capture",
    "ChannelSettings",
    "Generator",
    "GeneratorCaps",
    "GeneratorSettings",
    "LoadedDriver",
    "LoopSwitch",
    "ProbeSwitch",
    "Scope",
    "Session",
    "TemplateGenerator",
    "TemplateScope",
    "TemplateSwitch",
    "TrafficLog",
    "decode_block",
    "decode_samples",
    "driver_class",
    "driver_dirs",
    "encode_block",
    "encode_samples",
    "find_drivers",
    "get_driver",
    "load_driver",
    "match_driver",
    "open_instrument",
    "read_block",
]
