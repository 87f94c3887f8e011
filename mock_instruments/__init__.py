"""The simulated bench: DUT models, SCPI instruments, servers and fault hooks.

Modules (imported on demand, so that ``import mock_instruments`` stays cheap):

- :mod:`mock_instruments.bench`: ``SimulatedBench``, the physics the instruments share.
- :mod:`mock_instruments.duts`: DUT models by name (``DUTS``, ``load_dut``).
- :mod:`mock_instruments.instruments`: one ``handle(command) -> reply`` model per
  command dialect (``DIALECTS``, ``make_instrument``, ``make_instruments``).
- :mod:`mock_instruments.scpi`: the SCPI parser, error queue and common commands.
- :mod:`mock_instruments.faults`: fault hooks (late, garbled or no replies, dropped
  connections, injected errors, refused amplitudes, acquisitions that never end).
- :mod:`mock_instruments.server`: ``serve_bench``, one loopback TCP port per instrument.
- :mod:`mock_instruments.visa_backend`: ``InProcessBench`` / ``InProcessBackend``, the
  same instruments through pyvisa without sockets.
"""
