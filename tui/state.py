"""What the terminal UI knows: the latest of each live message, folded into one plain object.

:class:`ViewState` is the only thing the panels look at. It does no I/O: the application
receives :class:`spinflip.daemon.live.schema.Message` objects (see the docstring of
:mod:`spinflip.daemon.live.schema` for every field) and hands each one to :meth:`ViewState.apply`
with the time it arrived, on a monotonic clock in seconds; it sets :attr:`ViewState.now_s`
before every redraw so that the panels can tell how old the data are.

What goes where
---------------
=====================  ===========================================================
message                effect
=====================  ===========================================================
spectrum "integration" ``spectrum`` (header + arrays); its ``data`` row and its
                       ``flagged`` mask appended to ``waterfall``
spectrum "average"     ``average`` (header + arrays); also given to ``survey``
                       (:class:`~spinflip.tui.survey.SurveyState`: the newest average
                       of each target, for the survey view)
status                 ``status`` (header); ``tsys_k`` (when not null) appended to
                       ``tsys_history`` as (arrival time in s, Tsys in K); ``mount``
                       = its ``mount`` object, None when it has none
progress               ``progress`` (header); ``plan`` = its ``plan`` object, None
                       when it has none or it is null
event                  (time_utc, severity, text) appended to ``events``
any                    ``connected = True``, ``last_message_s`` = arrival time
=====================  ===========================================================

Notes
-----
A subscriber that joins or reconnects is sent the latest message of each topic again, and
so is every other subscriber, marked ``"replay": true`` (wire docstring, "Transport"). A
replayed message equal to the latest one taken of its topic and station (same ``seq`` and
``time_utc``) is ignored: it changes nothing, not even the time of the latest message
(:attr:`ViewState.replays_ignored` counts them). Besides, an integration already on the
waterfall (same station, scan, row and time) is not appended twice, nor is an event equal to
the last one.

A spectrum is kept as a dict: the header's fields, with ``"arrays"`` replaced by a dict
name -> NumPy array (``flagged`` as bool) and ``"units"`` holding name -> unit of each array.

A plan and a pointing driver are optional (wire docstring: ``progress.plan``,
``status.mount``): a daemon without them, or older than them, sends neither, and ``plan`` and
``mount`` stay None. Each message replaces the last of its topic whole, so a progress without
``plan`` after one with it means the plan is over, and a status without ``mount`` means no
driver.

Flagged is not all interference: with frequency switching folded, the channels at one band
edge have no partner in the other phase and are flagged as not covered. The status's ``rfi``
says which sky frequencies those are (``uncovered_hz``) and how much of the newest integration
is flagged for interference (``flagged_rfi_fraction``) and not covered
(``uncovered_fraction``); :meth:`ViewState.uncovered_channels` turns the range into a mask
so the panels can leave those channels out instead of showing them as flagged.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass, field

import numpy as np

from spinflip.daemon.live import schema
from spinflip.daemon.live.replays import ReplayFilter

from .survey import SurveyState

#: The axes the spectrum can be drawn against (toggled by :meth:`ViewState.toggle_axis`).
AXES = ("velocity", "frequency")
#: The screens (toggled by :meth:`ViewState.toggle_view`): the normal one, the survey view.
VIEWS = ("main", "survey")

#: How many of each kind of history the state keeps.
EVENTS_KEPT = 50
TSYS_KEPT = 300
WATERFALL_ROWS_KEPT = 60


def _spectrum_dict(message: schema.Message) -> dict:
    """The header of a spectrum message with its arrays by name (``flagged`` as bool)."""
    out = {k: v for k, v in message.header.items() if k != "arrays"}
    out["units"] = {d["name"]: d["unit"] for d in message.header["arrays"]}
    arrays = dict(message.arrays)
    if "flagged" in arrays:
        arrays["flagged"] = np.asarray(arrays["flagged"]).astype(bool)
    out["arrays"] = arrays
    return out


def _same_integration(a: dict | None, b: dict) -> bool:
    if a is None:
        return False
    keys = ("station", "scan", "row", "time_utc")
    return all(a.get(k) == b.get(k) for k in keys)


@dataclass
class ViewState:
    """The UI's picture of one daemon (plain data; :meth:`apply` is the only writer).

    Attributes
    ----------
    spectrum : dict or None
        Latest spectrum of kind "integration" (see the module Notes for its layout).
    average : dict or None
        Latest spectrum of kind "average" (the scan's running average).
    status, progress : dict or None
        Header of the latest "status" / "progress" message.
    events : deque of (str, str, str)
        (time_utc, severity, text) of the latest events, oldest first, at most 50.
    tsys_history : deque of (float, float)
        (arrival time in s on the app's monotonic clock, system temperature in K), at most 300.
    waterfall : deque of (numpy.ndarray, numpy.ndarray)
        (data as float array, flagged as bool array) of the latest integrations, oldest
        first, at most 60.
    axis : str
        "velocity" (LSRK radio velocity, km/s) or "frequency" (topocentric sky frequency, MHz).
    reply : str
        The last control reply, as the app wants it shown.
    endpoint : str
        The data endpoint the UI subscribes to (shown while waiting and when stale).
    connected : bool
        True once a message has arrived (the app may set it False when it knows better).
    last_message_s : float or None
        Arrival time of the latest message, s (monotonic); None until the first one.
    now_s : float
        The app's clock at the redraw, s (monotonic).
    stale_after_s : float
        Data older than this are stale, s.
    replays_ignored : int
        Replayed messages ignored because this state already had them.
    mount : dict or None
        The latest status's ``mount`` object (the pointing driver and where the dish is);
        None: no driver, or a daemon that does not send one.
    plan : dict or None
        The latest progress's ``plan`` object (where a running plan is); None: no plan.
    view : str
        "main" (the normal screen) or "survey" (the l-v diagram and rotation curve so far).
    survey : SurveyState
        The newest "average" spectrum of each target and what the survey view reduced from
        them (bounded; see :mod:`spinflip.tui.survey`).
    """

    spectrum: dict | None = None
    average: dict | None = None
    status: dict | None = None
    progress: dict | None = None
    events: deque = field(default_factory=lambda: deque(maxlen=EVENTS_KEPT))
    tsys_history: deque = field(default_factory=lambda: deque(maxlen=TSYS_KEPT))
    waterfall: deque = field(default_factory=lambda: deque(maxlen=WATERFALL_ROWS_KEPT))
    axis: str = "velocity"
    reply: str = ""
    endpoint: str = ""
    connected: bool = False
    last_message_s: float | None = None
    now_s: float = 0.0
    stale_after_s: float = 3.0
    replays_ignored: int = 0
    mount: dict | None = None
    plan: dict | None = None
    view: str = "main"
    survey: SurveyState = field(default_factory=SurveyState, repr=False)
    _replays: ReplayFilter = field(default_factory=ReplayFilter, repr=False)

    def apply(self, message: schema.Message, now_s: float) -> None:
        """Fold one decoded message into the state.

        Parameters
        ----------
        message : spinflip.daemon.live.schema.Message
            A message as :func:`spinflip.daemon.live.schema.decode` returns it (already checked
            against the schema). Unknown topics are ignored.
        now_s : float
            Its arrival time on the app's monotonic clock, s; also becomes :attr:`now_s`.
        """
        header = message.header
        topic = message.topic
        if topic not in schema.TOPICS:
            return
        if not self._replays.take(topic, header):
            self.replays_ignored = self._replays.repeats    # a message this state already has
            return
        if topic == "spectrum":
            spec = _spectrum_dict(message)
            if header.get("kind") == "average":
                self.average = spec
                self.survey.take(spec)
            else:
                if not _same_integration(self.spectrum, spec):
                    arrays = spec["arrays"]
                    data = np.asarray(arrays["data"], dtype=float)
                    flagged = np.asarray(arrays.get("flagged", np.zeros(data.shape, bool)),
                                         dtype=bool)
                    self.waterfall.append((data, flagged))
                self.spectrum = spec
        elif topic == "status":
            self.status = dict(header)
            mount = header.get("mount")
            self.mount = dict(mount) if isinstance(mount, dict) else None
            tsys_k = header.get("tsys_k")
            if tsys_k is not None and math.isfinite(tsys_k):
                self.tsys_history.append((float(now_s), float(tsys_k)))
        elif topic == "progress":
            self.progress = dict(header)
            plan = header.get("plan")
            self.plan = dict(plan) if isinstance(plan, dict) else None
        elif topic == "event":
            item = (header.get("time_utc", ""), header.get("severity", "info"),
                    header.get("text", ""))
            if not self.events or self.events[-1] != item:
                self.events.append(item)
        else:
            return
        self.connected = True
        self.last_message_s = float(now_s)
        self.now_s = float(now_s)

    def awaits_observer(self) -> bool:
        """True when the daemon waits for the observer to point the dish by hand (the
        manual driver in state "waiting"); ``p`` (the ``pointed`` command) answers it."""
        m = self.mount or {}
        return m.get("driver") == "manual" and m.get("state") == "waiting"

    def rfi_fractions(self) -> tuple[float | None, float | None]:
        """(fraction flagged for interference, fraction not covered by the fold) of the newest
        integration, from the status; None for each the daemon did not send."""
        rfi = (self.status or {}).get("rfi") or {}

        def frac(key: str) -> float | None:
            v = rfi.get(key)
            return float(v) if isinstance(v, (int, float)) and math.isfinite(v) else None
        return frac("flagged_rfi_fraction"), frac("uncovered_fraction")

    def uncovered_channels(self, spec: dict | None) -> np.ndarray:
        """bool per channel of ``spec``: not covered by the fold (no partner in the other
        switching phase), from the status's ``rfi.uncovered_hz`` [first, last] sky
        frequencies (Hz) against the spectrum's ``freq_hz``, half a channel of tolerance.
        All False when the status does not say (no fold, or an older daemon)."""
        if spec is None:
            return np.zeros(0, dtype=bool)
        freq = np.asarray(spec["arrays"].get("freq_hz", ()), dtype=float)
        out = np.zeros(freq.shape, dtype=bool)
        span = ((self.status or {}).get("rfi") or {}).get("uncovered_hz")
        if not (isinstance(span, (list, tuple)) and len(span) == 2 and freq.size > 1):
            return out
        try:
            first, last = sorted(float(v) for v in span)
        except (TypeError, ValueError):
            return out
        steps = np.abs(np.diff(freq))
        half = 0.5 * float(np.median(steps[np.isfinite(steps)])) if np.isfinite(steps).any() \
            else 0.0
        return np.isfinite(freq) & (freq >= first - half) & (freq <= last + half)

    def age_s(self) -> float | None:
        """Seconds since the latest message (``now_s - last_message_s``); None before one."""
        if self.last_message_s is None:
            return None
        return max(0.0, self.now_s - self.last_message_s)

    def is_stale(self) -> bool:
        """True when data had been arriving and none came for more than ``stale_after_s``.

        Before the first message the state is "waiting", not stale.
        """
        age = self.age_s()
        return age is not None and age > self.stale_after_s

    def toggle_axis(self) -> None:
        """Switch the spectrum's x axis between LSRK velocity and sky frequency."""
        self.axis = "frequency" if self.axis == "velocity" else "velocity"

    def toggle_view(self) -> None:
        """Switch between the normal screen and the survey view."""
        self.view = "survey" if self.view == "main" else "main"

    def has_data(self) -> bool:
        """True once any message has arrived."""
        return self.last_message_s is not None
