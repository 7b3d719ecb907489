"""Pointing drivers (issue 14, part 4): the rotctld client and the rotator against a REAL
``rotctld`` (Hamlib's dummy rotator, tests/rotctld_server.py), the hand-pointed and the fixed
dish, the factory.

The dummy rotator moves both axes at about 6 deg/s in real time, so every slew here is a few
degrees; the tests that wait for one are marked ``live``.
"""

from __future__ import annotations

import math
import socket
import threading
import time
from itertools import pairwise

import pytest
from rotctld_server import Rotctld

from spinflip.daemon import config
from spinflip.daemon.mount.base import (
    AzEl,
    Mount,
    MountCancelled,
    MountError,
    PointAgain,
    separation_deg,
)
from spinflip.daemon.mount.beam import tracking_step_deg
from spinflip.daemon.mount.factory import make_mount
from spinflip.daemon.mount.fixed import FixedMount
from spinflip.daemon.mount.manual import ManualMount
from spinflip.daemon.mount.rotator import RotatorMount, command_az
from spinflip.daemon.mount.rotctld import RotctldClient
from spinflip.daemon.sky.beam import beamwidth_deg as beam_fwhm_deg


class RecordingClient(RotctldClient):
    """The real client, remembering what it commanded (``(az, el)`` or ``"S"``)."""

    def __init__(self, endpoint: str, answer_s: float) -> None:
        super().__init__(endpoint, answer_s)
        self.commands: list = []

    def set_position(self, az_deg: float, el_deg: float) -> None:
        self.commands.append((az_deg, el_deg))
        super().set_position(az_deg, el_deg)

    def stop(self) -> None:
        self.commands.append("S")
        super().stop()


def make_cfg(endpoint: str = "127.0.0.1:9", **rotator) -> dict:
    rot = {"endpoint": endpoint, "poll_s": 0.1, "answer_s": 1.0, **rotator}
    return config.merge(config.defaults(), {"rotator": rot})


def rotator_mount(endpoint: str, **rotator) -> tuple[RotatorMount, RecordingClient]:
    cfg = make_cfg(endpoint, **rotator)
    client = RecordingClient(endpoint, cfg["rotator"]["answer_s"])
    return RotatorMount(cfg, client=client), client


def near(pos: AzEl, daz: float, del_: float) -> AzEl:
    """A position a few degrees from ``pos`` (elevation kept inside 0..90)."""
    el = pos.el_deg + del_ if pos.el_deg + del_ <= 80 else pos.el_deg - del_
    return AzEl((pos.az_deg + daz) % 360.0, el)


def wait_at(client: RotctldClient, want: AzEl, within: float = 0.05,
            deadline_s: float = 15.0) -> AzEl:
    """Read the position until it is within ``within`` deg of ``want`` (generous deadline)."""
    end = time.monotonic() + deadline_s
    while True:
        pos = client.get_position()
        if separation_deg(pos, want) <= within:
            return pos
        assert time.monotonic() < end, f"the rotator never reached {want}: at {pos}"
        time.sleep(0.05)


@pytest.fixture(scope="module")
def rotctld():
    server = Rotctld().start()
    yield server
    server.kill()


@pytest.fixture
def own_rotctld():
    """A rotctld of the test's own, for killing and pausing."""
    server = Rotctld().start()
    yield server
    server.kill()


# -- the beam and the azimuth wrap (pure) -----------------------------------------------------
def test_beam_and_tracking_step():
    # lambda = c / 1420.405751768 MHz = 0.21106 m (the 21 cm line; value from memory), FWHM =
    # 1.2 lambda / D (common practice): 4.84 deg for the default 3 m dish.
    assert beam_fwhm_deg(3.0) == pytest.approx(math.degrees(1.2 * 0.211061 / 3.0), rel=1e-5)
    assert beam_fwhm_deg(3.0) == pytest.approx(4.837, abs=1e-3)
    cfg = make_cfg()
    assert tracking_step_deg(cfg) == pytest.approx(0.1 * 4.837, abs=1e-3)     # a tenth of the beam
    cfg = make_cfg(tolerance_deg=0.4)
    assert tracking_step_deg(cfg) == pytest.approx(0.2)                       # half the tolerance


@pytest.mark.parametrize("az, current, lo, hi, expected", [
    (10.0, 350.0, -180.0, 450.0, 370.0),     # past north the short way, not back round
    (10.0, 0.0, -180.0, 450.0, 10.0),
    (350.0, 5.0, -180.0, 450.0, -10.0),
    (-10.0, 180.0, 0.0, 360.0, 350.0),       # a negative azimuth into the range
    (359.9, 1.0, 0.0, 360.0, 359.9),         # the only one inside, however far
    (0.0, 359.0, 0.0, 360.0, 360.0),         # both ends are inside: the near one
    (100.0, None, -180.0, 450.0, 100.0),     # no position known: the lowest
    (250.3, 90.0, 0.0, 180.0, None),         # none inside a cable-stopped range
])
def test_command_az_wraps_into_the_range_nearest_the_present_azimuth(az, current, lo, hi, expected):
    got = command_az(az, current, lo, hi)
    assert got == (None if expected is None else pytest.approx(expected))


def test_limits_are_refused_by_refuse_and_acquire_before_anything_is_sent():
    mount, client = rotator_mount("127.0.0.1:9", az_range=[0, 180], el_range=[10, 80],
                                  park=[0, 80])
    assert mount.refuse(AzEl(250.3, 30.0)) == (
        "az 250.3 deg is outside the rotator's limits (rotator.az_range = [0, 180])")
    assert mount.refuse(AzEl(90.0, 85.0)) == (
        "el 85.0 deg is outside the rotator's limits (rotator.el_range = [10, 80])")
    assert mount.refuse(AzEl(-200.0, 30.0)) is None            # = az 160, inside
    with pytest.raises(MountError) as err:
        mount.acquire(lambda: AzEl(250.3, 30.0), threading.Event())
    assert str(err.value) == ("rotator at 127.0.0.1:9: az 250.3 deg is outside the rotator's "
                              "limits (rotator.az_range = [0, 180])")
    assert client.commands == []
    assert mount.status().state == "idle"       # the target was refused, the mount is fine


def test_client_names_the_endpoint_when_nothing_listens():
    port = _closed_port()
    client = RotctldClient(f"127.0.0.1:{port}", 1.0)
    with pytest.raises(MountError) as err:
        client.get_position()
    assert str(err.value) == (f"rotator at 127.0.0.1:{port}: connection refused "
                              "(is rotctld running there?)")


def _closed_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_client_refuses_an_unparseable_answer_in_one_line():
    """A server that answers 'p' with words, and 'S' with nothing RPRT-like."""
    srv = socket.create_server(("127.0.0.1", 0))
    port = srv.getsockname()[1]

    def serve():
        for _ in range(2):
            conn, _ = srv.accept()
            with conn:
                f = conn.makefile("rb")
                for line in f:
                    conn.sendall(b"hello\nworld\n" if line.strip() == b"p" else b"OK\n")

    threading.Thread(target=serve, daemon=True).start()
    client = RotctldClient(f"127.0.0.1:{port}", 2.0)
    with pytest.raises(MountError) as err:
        client.get_position()
    assert str(err.value) == (f"rotator at 127.0.0.1:{port}: unparseable answer to 'p': "
                              "'hello | world' (expected two numbers, azimuth and elevation)")
    with pytest.raises(MountError, match=r"unparseable answer to 'S': 'OK' \(expected RPRT 0\)"):
        client.stop()
    client.close()
    srv.close()


# -- against a real rotctld -------------------------------------------------------------------
def test_client_reads_and_sets_the_position(rotctld):
    client = RotctldClient(rotctld.endpoint, 2.0)
    start = client.get_position()
    assert 0.0 <= start.el_deg <= 90.0
    want = near(start, 1.0, 1.0)
    client.set_position(want.az_deg, want.el_deg)
    reached = wait_at(client, want)
    assert reached.az_deg == pytest.approx(want.az_deg, abs=0.05)
    # outside the dummy's limits (az -180..450): RPRT -1, the connection stays usable
    with pytest.raises(MountError) as err:
        client.set_position(500.0, 45.0)
    assert str(err.value) == (f"rotator at {rotctld.endpoint}: refused 'P 500.00 45.00': "
                              "RPRT -1 (invalid parameter)")
    assert separation_deg(client.get_position(), reached) < 0.05     # and it did not move
    client.close()


def test_acquire_slews_and_returns_within_tolerance(rotctld):
    mount, client = rotator_mount(rotctld.endpoint, tolerance_deg=0.5)
    start = client.get_position()
    want = near(start, 3.0, 2.0)
    reached = mount.acquire(lambda: want, threading.Event())
    assert separation_deg(reached, want) <= 0.5
    assert separation_deg(reached, start) > 2.5          # it really moved there
    assert client.commands == [(pytest.approx(want.az_deg), pytest.approx(want.el_deg))]
    status = mount.status()
    assert status.state == "tracking" and status.detail == rotctld.endpoint
    assert (status.target_az_deg, status.target_el_deg) == (want.az_deg, want.el_deg)
    assert status.error_deg is not None and status.error_deg <= 0.5


def test_acquire_follows_a_moving_target_commanding_again_past_each_step(rotctld):
    mount, client = rotator_mount(rotctld.endpoint, tolerance_deg=0.5)   # step 0.25 deg
    start = client.get_position()
    t0 = time.monotonic()
    base = near(start, 3.0, 0.0)

    def where() -> AzEl:                                # 1 deg/s in azimuth
        return AzEl(base.az_deg + (time.monotonic() - t0), base.el_deg)

    reached = mount.acquire(where, threading.Event())
    assert separation_deg(reached, where()) <= 0.5 + 0.3      # (where() has moved on since)
    assert len(client.commands) >= 2
    steps = [separation_deg(AzEl(*a), AzEl(*b)) for a, b in pairwise(client.commands)]
    assert all(s > mount.step_deg for s in steps), steps   # never before the target moved a step


def test_tracking_commands_again_only_after_the_target_moved_more_than_the_step(rotctld):
    mount, client = rotator_mount(rotctld.endpoint)                       # step 0.48 deg
    assert mount.step_deg == pytest.approx(0.4837, abs=1e-3)
    want = near(client.get_position(), 2.0, 2.0)
    mount.acquire(lambda: want, threading.Event())
    wait_at(client, want)
    n = len(client.commands)
    small = AzEl(want.az_deg, want.el_deg + 0.3)            # 0.3 deg < step: no command
    pos = mount.track(small)
    assert len(client.commands) == n
    assert separation_deg(pos, want) < 0.05
    big = AzEl(want.az_deg, want.el_deg + 0.6)              # 0.6 deg > step: commanded
    mount.track(big)
    assert client.commands[n:] == [(pytest.approx(big.az_deg), pytest.approx(big.el_deg))]
    wait_at(client, big)                                    # and the rotator went there
    mount.track(AzEl(want.az_deg, want.el_deg + 0.9))      # 0.3 deg from the last command
    assert len(client.commands) == n + 1
    assert mount.status().state == "tracking"


def test_tracking_fails_when_the_dish_is_farther_than_the_tolerance(rotctld):
    mount, client = rotator_mount(rotctld.endpoint)
    pos = client.get_position()
    far = near(pos, 10.0, 0.0)
    with pytest.raises(MountError) as err:
        mount.track(far)
    client.stop()
    msg = str(err.value)
    assert msg.startswith(f"rotator at {rotctld.endpoint}: the dish is 10.0 deg from the target "
                          "(tolerance 1 deg)") and "\n" not in msg
    assert mount.status().state == "fault" and mount.status().detail == msg


def test_acquire_goes_past_north_the_short_way(own_rotctld):
    """A fresh dummy rotator is at az 0; az 359 is commanded as -1 inside its -180..450 range."""
    mount, client = rotator_mount(own_rotctld.endpoint, az_range=[-180, 450], timeout_s=5.0)
    assert separation_deg(client.get_position(), AzEl(0.0, 0.0)) < 0.01
    reached = mount.acquire(lambda: AzEl(359.0, 1.0), threading.Event())
    assert client.commands == [(pytest.approx(-1.0), pytest.approx(1.0))]
    assert separation_deg(reached, AzEl(359.0, 1.0)) <= 1.0 and reached.az_deg < 0.5


def test_park_reaches_the_park_position(rotctld):
    probe = RotctldClient(rotctld.endpoint, 2.0)
    park = near(probe.get_position(), 2.0, 2.0)
    probe.close()
    mount, client = rotator_mount(rotctld.endpoint, tolerance_deg=0.2,
                                  park=[round(park.az_deg, 2), round(park.el_deg, 2)])
    reached = mount.park()
    assert reached is not None and separation_deg(reached, park) <= 0.2
    assert mount.status().state == "parked"
    assert client.commands == [(pytest.approx(park.az_deg, abs=0.01),
                                pytest.approx(park.el_deg, abs=0.01))]


@pytest.mark.live
def test_cancelled_acquire_stops_the_rotator(rotctld):
    mount, client = rotator_mount(rotctld.endpoint)
    want = near(client.get_position(), 30.0, 0.0)            # 5 s away
    cancel = threading.Event()
    timer = threading.Timer(0.4, cancel.set)
    timer.start()
    with pytest.raises(MountCancelled):
        mount.acquire(lambda: want, cancel)
    assert client.commands[-1] == "S"
    a = client.get_position()
    time.sleep(0.4)
    b = client.get_position()
    assert separation_deg(a, b) < 0.01                      # stopped, not still slewing
    assert separation_deg(b, want) > 20.0
    assert mount.status().state == "idle"


@pytest.mark.live
def test_a_slew_longer_than_timeout_s_never_arrives(rotctld):
    mount, client = rotator_mount(rotctld.endpoint, timeout_s=1.0)
    want = near(client.get_position(), 20.0, 0.0)            # 3 s away at 6 deg/s
    t0 = time.monotonic()
    with pytest.raises(MountError) as err:
        mount.acquire(lambda: want, threading.Event())
    assert time.monotonic() - t0 >= 1.0
    msg = str(err.value)
    assert msg.startswith(f"rotator at {rotctld.endpoint}: never arrived within 1 s "
                          "(rotator.timeout_s)") and msg.endswith("stopped")
    assert client.commands[-1] == "S"
    assert mount.status().state == "fault"


@pytest.mark.live
def test_rotctld_killed_is_a_one_line_fault_and_restarted_it_answers_again(own_rotctld):
    mount, client = rotator_mount(own_rotctld.endpoint, answer_s=0.5)
    first = near(client.get_position(), 1.0, 1.0)
    mount.acquire(lambda: first, threading.Event())
    own_rotctld.kill()
    t0 = time.monotonic()
    with pytest.raises(MountError) as err:
        mount.track(AzEl(1.0, 1.0))
    assert time.monotonic() - t0 < 0.5 + 5.0                 # bounded by answer_s, not hung
    msg = str(err.value)
    assert msg.startswith(f"rotator at {own_rotctld.endpoint}: ") and "\n" not in msg
    assert mount.status().state == "fault" and mount.status().detail == msg

    cancel = threading.Event()
    result: list[bool] = []
    waiter = threading.Thread(target=lambda: result.append(mount.wait_until_answering(cancel)))
    waiter.start()
    time.sleep(0.3)
    assert waiter.is_alive()                                 # nobody answers yet
    own_rotctld.start()                                      # the same port
    waiter.join(10.0)
    cancel.set()
    assert result == [True]
    assert mount.status().state == "idle"
    want = near(client.get_position(), 1.0, 1.0)
    assert separation_deg(mount.acquire(lambda: want, threading.Event()), want) <= 1.0


def test_no_answer_within_answer_s_then_answers_again(own_rotctld):
    mount, client = rotator_mount(own_rotctld.endpoint, answer_s=0.3)
    client.get_position()                                    # connected
    own_rotctld.pause()
    t0 = time.monotonic()
    try:
        with pytest.raises(MountError) as err:
            mount.track(AzEl(0.0, 0.0))
        assert time.monotonic() - t0 >= 0.3
        assert str(err.value) == f"rotator at {own_rotctld.endpoint}: no answer to 'p' within 0.3 s"
        cancel = threading.Event()
        timer = threading.Timer(10.0, cancel.set)           # a bound, should it never answer
        timer.start()
        own_rotctld.resume()
        assert mount.wait_until_answering(cancel)
        timer.cancel()
    finally:
        own_rotctld.resume()


def test_wait_until_answering_returns_false_when_cancelled():
    mount, _ = rotator_mount(f"127.0.0.1:{_closed_port()}")
    cancel = threading.Event()
    threading.Timer(0.3, cancel.set).start()
    assert mount.wait_until_answering(cancel) is False


# -- the hand-pointed dish --------------------------------------------------------------------
def manual() -> tuple[ManualMount, list[str]]:
    prompts: list[str] = []
    return ManualMount(config.defaults(), prompts.append), prompts


def confirm_soon(mount: ManualMount, reached: AzEl | None, seen: list) -> threading.Thread:
    def go():
        end = time.monotonic() + 10.0
        while mount.status().state != "waiting" and time.monotonic() < end:
            time.sleep(0.01)
        seen.append(mount.status())
        mount.confirm(reached)
    t = threading.Thread(target=go)
    t.start()
    return t


def test_manual_acquire_asks_and_waits_for_the_confirmation():
    mount, prompts = manual()
    want = AzEl(181.23, 44.91)
    seen: list = []
    t = confirm_soon(mount, None, seen)
    got = mount.acquire(lambda: want, threading.Event())
    t.join()
    assert got == want
    assert prompts == ["point the dish at az 181.2 el 44.9 deg, then confirm: spinflip ctl "
                       "pointed (or az_deg=... el_deg=... where it really points), or p in "
                       "spinflip watch"]
    assert seen[0].state == "waiting" and seen[0].detail == prompts[0]
    assert mount.status().state == "tracking"
    assert (mount.status().az_deg, mount.status().el_deg) == (181.23, 44.91)


def test_manual_confirm_with_where_it_really_points_is_returned():
    mount, _ = manual()
    seen: list = []
    t = confirm_soon(mount, AzEl(-178.0, 46.0), seen)
    got = mount.acquire(lambda: AzEl(181.2, 44.9), threading.Event())
    t.join()
    assert got == AzEl(182.0, 46.0)                          # az taken into 0..360
    assert mount.status().error_deg == pytest.approx(separation_deg(got, AzEl(181.2, 44.9)))


def test_manual_confirm_when_not_waiting_is_refused():
    mount, _ = manual()
    with pytest.raises(ValueError) as err:
        mount.confirm(None)
    assert str(err.value) == "pointed: the daemon is not waiting for the dish to be pointed"


def test_manual_acquire_cancelled_then_a_late_confirm_is_refused():
    mount, _ = manual()
    cancel = threading.Event()
    threading.Timer(0.2, cancel.set).start()
    with pytest.raises(MountCancelled):
        mount.acquire(lambda: AzEl(10.0, 20.0), cancel)
    assert mount.status().state == "idle"
    with pytest.raises(ValueError, match="not waiting"):
        mount.confirm(None)


def test_manual_track_holds_the_pointed_position_until_the_target_leaves_half_the_beam():
    mount, _ = manual()
    assert mount.tolerance_deg == pytest.approx(4.837 / 2, abs=1e-3)
    t = confirm_soon(mount, None, [])
    pointed = mount.acquire(lambda: AzEl(100.0, 30.0), threading.Event())
    t.join()
    assert mount.track(AzEl(100.0, 32.0)) == pointed          # 2 deg < 2.42 deg: still on it
    with pytest.raises(PointAgain) as err:                    # a MountError the runner
        mount.track(AzEl(100.0, 33.0))                        # answers by asking again
    assert str(err.value) == ("manual pointing: the target has moved 3.0 deg from where the dish "
                              "was pointed (more than half the beam, 2.4 deg): point again")
    assert mount.status().state == "tracking" and mount.status().detail == str(err.value)
    seen: list = []                                           # and it can be pointed again
    t = confirm_soon(mount, None, seen)
    assert mount.acquire(lambda: AzEl(100.0, 33.0), threading.Event()) == AzEl(100.0, 33.0)
    t.join()
    assert seen[0].state == "waiting"
    assert mount.track(AzEl(100.0, 33.5)) == AzEl(100.0, 33.0)


def test_manual_refuses_below_the_horizon_and_parks_by_asking():
    mount, prompts = manual()
    assert mount.refuse(AzEl(10.0, -3.0)) is not None and "-3.0" in mount.refuse(AzEl(10.0, -3.0))
    assert mount.refuse(AzEl(10.0, 3.0)) is None
    with pytest.raises(MountError, match="outside 0..90"):
        mount.acquire(lambda: AzEl(10.0, -3.0), threading.Event())
    assert prompts == []
    assert mount.park() is None
    assert prompts == ["observing is over: park the dish (no confirmation needed)"]
    assert mount.status().state == "parked"


# -- the fixed dish and the factory -----------------------------------------------------------
def test_fixed_dish_takes_the_target_as_it_comes():
    mount = FixedMount(config.defaults())
    assert mount.status().state == "idle" and mount.status().az_deg is None
    assert mount.refuse(AzEl(0.0, -20.0)) is None
    assert mount.acquire(lambda: AzEl(12.0, 34.0), threading.Event()) == AzEl(12.0, 34.0)
    assert mount.track(AzEl(13.0, 35.0)) == AzEl(13.0, 35.0)
    status = mount.status()
    assert (status.state, status.az_deg, status.el_deg, status.error_deg) == ("tracking", 13.0, 35.0, 0.0)
    assert mount.park() is None and mount.status().state == "idle"


@pytest.mark.parametrize("driver, kind", [("none", FixedMount), ("manual", ManualMount),
                                          ("rotator", RotatorMount)])
def test_make_mount_gives_the_configured_driver(driver, kind):
    cfg = config.merge(config.defaults(), {"pointing": {"driver": driver}})
    mount = make_mount(cfg, lambda text: None)
    assert isinstance(mount, kind) and isinstance(mount, Mount)
    assert mount.driver == driver
    assert mount.status().driver == driver
    mount.close()
