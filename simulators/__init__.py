"""Simulated flight controller on a simulated airframe (device side of the spinrig protocol).

Imports ``firmware_protocol`` only, never ``monitor``. :func:`register` adds the ``sim://``
pyserial URL handler, so ``serial.serial_for_url("sim://quillback7?seed=1")`` opens an
in-process simulated device through exactly the code path of a real port.
"""

from __future__ import annotations


def register() -> None:
    """Make ``sim://`` URLs openable with ``serial.serial_for_url`` (idempotent)."""
    import serial

    if "simulators.urlhandler" not in serial.protocol_handler_packages:
        serial.protocol_handler_packages.append("simulators.urlhandler")
