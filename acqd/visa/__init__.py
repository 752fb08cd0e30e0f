"""The transport: one VISA session per instrument (pyvisa, ``@py`` backend by default).

It owns everything below the SCPI text: terminations, timeouts in seconds, fast IEEE 488.2 block reads,
the error queue, draining a late reply after a timeout, reconnecting, and turning every VISA or socket
failure into one ``InstrumentError`` line that names the resource.
"""

from .session import DEFAULT_BACKEND, NAMED_BACKENDS, InstrumentTimeout, Session, identify

__all__ = ["DEFAULT_BACKEND", "NAMED_BACKENDS", "InstrumentTimeout", "Session", "identify"]
