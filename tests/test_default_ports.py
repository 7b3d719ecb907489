"""The default ports guard of tests/conftest.py: no test can bind 5621/5622 (where a daemon
left with the default ``[publish]`` section would publish)."""

import errno

import pytest
import zmq
from conftest import DEFAULT_PORTS

from spinflip.daemon import config


def test_the_guarded_ports_are_the_configuration_defaults():
    publish = config.defaults()["publish"]
    assert [publish["data"], publish["control"]] == [f"tcp://127.0.0.1:{p}" for p in DEFAULT_PORTS]


@pytest.mark.parametrize("port", DEFAULT_PORTS)
def test_a_test_cannot_bind_a_default_port(port):
    sock = zmq.Context.instance().socket(zmq.PUB)
    sock.setsockopt(zmq.LINGER, 0)
    try:
        with pytest.raises(zmq.ZMQError) as err:
            sock.bind(f"tcp://127.0.0.1:{port}")
        assert err.value.errno == errno.EADDRINUSE
    finally:
        sock.close(0)
