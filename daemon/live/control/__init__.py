"""The control channel of the daemon: JSON commands over a ZeroMQ socket, and its client.

:mod:`~spinflip.daemon.live.control.protocol` holds the commands and the checking of a request
(the module docstring there describes the wire form), :mod:`~spinflip.daemon.live.control.server`
the thread that answers on a ROUTER socket, :mod:`~spinflip.daemon.live.control.client`
:func:`request` and ``spinflip ctl``. Their public names are importable from here.
"""

from spinflip.daemon.live.control.client import (
    ctl_main,
    format_result,
    parse_words,
    request,
)
from spinflip.daemon.live.control.protocol import (
    COMMANDS,
    DEFAULT_ENDPOINT,
    DEFAULT_TIMEOUT_S,
    MAX_FRAME_BYTES,
    MAX_REQUEST_BYTES,
    OBJECT_MAX_CHARS,
    ArgSpec,
    CommandError,
    CommandSpec,
    ControlError,
    Handler,
    parse_request,
    validate_args,
    validate_request,
)
from spinflip.daemon.live.control.server import ControlServer

__all__ = ["COMMANDS", "DEFAULT_ENDPOINT", "DEFAULT_TIMEOUT_S", "MAX_FRAME_BYTES",
           "MAX_REQUEST_BYTES", "OBJECT_MAX_CHARS", "ArgSpec", "CommandError", "CommandSpec",
           "ControlError", "ControlServer", "Handler", "ctl_main", "format_result",
           "parse_request", "parse_words", "request", "validate_args", "validate_request"]
