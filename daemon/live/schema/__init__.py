"""The live-data wire format of spinflip's ZeroMQ PUB socket: the schema, written down once.

This docstring is the schema. It is enough to write a subscriber in any language; nothing
below it adds rules, it only checks them.

Transport
---------
The daemon binds a ZeroMQ PUB socket (default ``tcp://127.0.0.1:5621``); a subscriber
connects a SUB socket to it and subscribes to a topic (ZeroMQ matches the first frame by
prefix; subscribe to ``""`` for every topic). No topic is a prefix of another. A PUB socket
drops messages for a subscriber that does not keep up: a subscriber sees every message it
receives whole, but may miss some (the daemon counts its own drops in ``status.drops``; gaps
in ``seq`` show all of them). A new subscription is answered at once with the latest message
of each topic, so a subscriber that joins or reconnects has the current state at once. PUB
fans out to every subscriber, so this replay reaches the subscribers already connected as
well: a replayed message carries ``"replay": true`` and its original ``seq``, and a reader
that already has that message (same topic, ``station``, ``seq`` and ``time_utc`` as the
latest one it took) ignores it. Only subscriptions that are a prefix of a topic (``""``
included) are taken; any other is ignored.

Limits: the daemon disconnects a peer that sends it a frame over 1 KiB on the data socket
(subscriptions are a few bytes); a reader refuses a header over :data:`MAX_HEADER_BYTES`
(64 KiB) or nested deeper than :data:`MAX_DEPTH` (16), more than :data:`MAX_ARRAYS` (16)
payload frames, an array of more than :data:`MAX_DIMS` (8) dimensions, or payload over
:data:`MAX_PAYLOAD_BYTES` (the largest ``spectrometer.channels``, 65536, times 8 bytes times
16 arrays: 8 MiB); ``spinflip collect`` disconnects from a station that sends a frame over
:data:`MAX_FRAME_BYTES` (its ZeroMQ socket's ``MAXMSGSIZE``) and reconnects.
``spinflip collect`` relays the messages of several stations on one PUB socket, unchanged
except for ``station``.

Frames
------
A message is one ZeroMQ multipart message of ``2 + N`` frames::

    frame 0        topic   ASCII word, one of "spectrum", "status", "progress", "event"
    frame 1        header  UTF-8 JSON object (strict JSON: no NaN or Infinity tokens)
    frames 2..N+1  payload one frame per entry of header["arrays"], in the same order

Common header fields (every topic)
----------------------------------
=============  ==========================  ===============================================
field          JSON type                   meaning
=============  ==========================  ===============================================
schema         integer                     schema version, 1 (this document). A reader
                                           refuses any other version.
topic          string                      equal to frame 0
time_utc       string                      ISO 8601 with a UTC offset, written
                                           ``YYYY-MM-DDTHH:MM:SS.ffffffZ``; readers also
                                           accept ``+00:00`` for ``Z``. For a spectrum the
                                           UTC mid-time of its integration (of the latest
                                           one, for an average), otherwise when the
                                           message was made.
seq            integer (optional)          per-topic message counter of the sending
                                           daemon, from 1; restarts with the daemon
replay         boolean (optional)          true: the message was sent before and is
                                           sent again to bring a new subscriber up to
                                           date (see Transport); absent or false: new
station        string                      "" from a daemon; the station's name when
                                           relayed by ``spinflip collect``
arrays         array of objects            one per payload frame, in frame order:
                                           ``{"name": str, "dtype": str,
                                           "shape": [int, ...], "unit": str}``
=============  ==========================  ===============================================

A reader ignores header fields and payload arrays it does not know: fields and arrays may
be added within a schema version; removing one or changing its type, unit or meaning makes
a new version.
"number" below means a JSON number (integer or decimal), "integer" a JSON number without
fraction or exponent, and "| null" that JSON ``null`` is allowed (meaning: not known).

Payload arrays
--------------
Each payload frame is the raw bytes of one array, C order (row-major, last index fastest),
no padding, no header of its own. ``dtype`` is one of

=======  ====================================================
``<f4``  IEEE 754 float32, little-endian (4 bytes)
``<f8``  IEEE 754 float64, little-endian (8 bytes)
``<i8``  two's-complement signed int64, little-endian (8 bytes)
``|u1``  unsigned byte (1 byte); booleans are sent as 0 / 1
=======  ====================================================

``shape`` is a list of non-negative integers (``[]`` is a single value) and the frame's
length in bytes is exactly ``product(shape) * itemsize``. ``unit`` is the physical unit of
the values ("" when dimensionless or boolean). Array names are unique within a message.
Unlike the header, payload floats may be NaN: no value (e.g. a channel of an average that no
integration covered; such a channel is also flagged).

Topic "spectrum": one calibrated spectrum
-----------------------------------------
==================  ==============  =========================================================
field               JSON type       meaning
==================  ==============  =========================================================
kind                string          "integration" (one integration, one row of the scan's
                                    file) or "average" (the running average of the scan's
                                    integrations so far, on the LSRK velocity grid of its
                                    first one; flagged channels carry no weight)
scan                string          the scan's name (its file is ``<scan>.fits``)
row                 integer         0-based row of the integration in the scan; for an
                                    "average", the row of the latest integration in it
exposure_s          number          effective integration time, s
tsys_k              number | null   system temperature, K
unit                string          unit of ``data``: "K" (calibrated) or "count"
restfreq_hz         number          rest frequency of the line, Hz
vframe_m_s          number          LSRK radio velocity of a body at rest relative to the
                                    telescope, m/s: v_LSRK = v_topocentric + vframe_m_s
glon_deg, glat_deg  number          galactic longitude, latitude of the pointing, deg
azimuth_deg         number          azimuth, from north through east, deg
elevation_deg       number          elevation above the horizon, deg
ra_deg, dec_deg     number          ICRS right ascension, declination, deg
object              string          name of the target
folded              boolean         true if the frequency-switched copies were folded
flagged_fraction    number          fraction (0..1) of channels flagged
blanked_fraction    number          fraction (0..1) of samples blanked as impulses
nimpulse            integer         impulses blanked in the integration
ncarrier            integer         carrier channels flagged in the integration
pointing_error_deg  number | null   (optional) angle between the position the dish
                                    reached (azimuth_deg, elevation_deg: reported by the
                                    rotator or confirmed by the observer) and the
                                    target's, deg; null when no driver reports one
==================  ==============  =========================================================

Arrays, all of shape ``[nchan]`` (nchan >= 1); element i of every array belongs to channel i,
whose sky frequency is ``freq_hz[i]``:

=================  =======  ========  ============================================
name               dtype    unit      values
=================  =======  ========  ============================================
freq_hz            ``<f8``  "Hz"      topocentric sky frequency of each channel
v_lsrk_km_s        ``<f8``  "km/s"    LSRK radio velocity of each channel
data               ``<f4``  "K" or    the spectrum; its unit equals header ``unit``
                            "count"
flagged            ``|u1``  ""        1 where the channel is flagged, else 0
exposure_s         ``<f4``  "s"       per-channel exposure left after flagging
=================  =======  ========  ============================================

Topic "status": the daemon's state
----------------------------------
==================  ==============  =========================================================
state               string          "observing", "paused", "idle", "reconnecting" (the
                                    source was lost; reopening it), "stopping", or under a
                                    plan "slewing" (the dish moving to its next target;
                                    nothing is kept) or "waiting" (for the observer to
                                    point the dish, a target to rise, the rotator to answer
                                    again, or ``resume`` after ``park``)
source              string          the source of samples ("sim", "rtlsdr", "replay", ...)
lo_hz               number          local-oscillator (tuner centre) frequency, Hz
gain_db             number          tuner gain, dB
sample_rate_hz      number          complex sample rate, Hz
tsys_k              number | null   latest system temperature, K
tsys_source         string          where tsys_k comes from (e.g. "noise_source")
samples_received    integer         complex samples received since start
samples_lost        integer         complex samples lost since start
queue_depth         integer         blocks waiting between reader and DSP
disk_free_bytes     integer         free space in the output folder, bytes
writing             string          "writing"; "holding": the disk refuses writes and
                                    finished integrations wait in memory; or "failed": the
                                    writer thread is gone and the daemon is stopping
held_integrations   integer         integrations waiting in memory to be written
dropped_integrations integer        integrations dropped since start: the memory bound
                                    (output.hold_mb) was reached while holding, or one could
                                    not be written (an error event says why)
worker_failures     object          ``{thread: integer}`` unexpected failures of the
                                    daemon's threads since start ("reader", "writer",
                                    "publisher", "control", "status", "watchdog"); each is
                                    also an error event; empty when none failed
uptime_s            number          seconds since the daemon started
version             string          spinflip version
scan                string | null   the scan being written, null between scans
pointing            object          ``{"frame": string, "lon_deg": number,
                                    "lat_deg": number, "object": string}``; frame is
                                    "galactic", "radec" or "azel"
drops               object          ``{topic: integer}`` messages dropped per topic
rfi                 object          ``{"impulses", "carrier_onsets", "sk_cells",
                                    "blanked_spectra"}``, integers since start; and of
                                    the newest integration (null before the first):
                                    ``"flagged_rfi_fraction"`` number, fraction (0..1) of
                                    its channels flagged for interference (carriers,
                                    spurs, masks, channels emptied by flagging; not the
                                    DC channel); ``"uncovered_fraction"`` number,
                                    fraction (0..1) of its channels without a fold
                                    partner (flagged, but no interference; 0 unfolded);
                                    ``"uncovered_hz"`` ``[first, last]`` numbers,
                                    topocentric sky frequencies of the first and last
                                    uncovered channel (one run at a band edge), Hz, or
                                    null when none is
mount (optional)    object          the pointing driver: ``{"driver": "none" | "manual" |
                                    "rotator", "state": "idle" | "slewing" | "tracking" |
                                    "waiting" (for the observer) | "parking" | "parked" |
                                    "fault", "az_deg", "el_deg" (where the dish is:
                                    reported by the rotator or confirmed by the observer),
                                    "target_az_deg", "target_el_deg" (where it should be),
                                    "error_deg" (the angle between them), each number |
                                    null, "detail": string (the rotator's endpoint, the
                                    prompt to the observer, or the fault)}``
==================  ==============  =========================================================

No arrays (in this version).

Topic "progress": where the observation is
------------------------------------------
=====================  ==============  ====================================================
scan                   string | null   the scan, null between scans
integration            integer         0-based number of the integration being summed
integration_elapsed_s  number          time summed into it so far, s
integration_total_s    number          its full length, s
scan_elapsed_s         number          time observed in this scan, s
scan_total_s           number | null   the scan's planned length, s; null: unbounded
eta_s                  number | null   time to the scan's end, s; null: unknown
plan (optional)        object | null   a running plan (null or absent: none):
                                       ``{"name": string, "step": integer (1-based
                                       visit being made or last made, 0 before the
                                       first), "steps": integer (visits in the plan),
                                       "object": string | null (the current target),
                                       "phase": "slewing" | "waiting" | "observing" |
                                       "deferred" (nothing is up yet) | "paused" |
                                       "parked" | "finished", "visit_elapsed_s":
                                       number, "visit_total_s": number | null (on-source
                                       time of the visit, s), "eta_s": number | null
                                       (time to the plan's end by its schedule, s),
                                       "done": integer, "abandoned": integer (visits),
                                       "upcoming": [{"object", "start_utc"}],
                                       "skipped": [{"object", "reason"}]}``, each list
                                       at most 20 long
=====================  ==============  ====================================================

No arrays (in this version).

Topic "event": something an observer must see
---------------------------------------------
==========  ======  =========================================================
severity    string  "info", "warning" or "error"
text        string  one line (no line breaks)
==========  ======  =========================================================

No arrays (in this version).

Notes
-----
:func:`encode` checks a message against this schema before it leaves, :func:`decode` checks
every message it reads; both raise :class:`WireError` (a ``ValueError``) with one line.
The tables and checks of the schema are :mod:`~spinflip.daemon.live.schema.fields`, building
and reading the frames :mod:`~spinflip.daemon.live.schema.frames`; their names are importable
from here.

References
----------
ZeroMQ RFC 29/PUBSUB (topic prefix matching, dropping for slow subscribers) and
RFC 23/ZMTP (multipart messages), https://rfc.zeromq.org (from memory).
RFC 8259 (JSON), RFC 3339 (the ISO 8601 profile of ``time_utc``), IEEE 754 (floats).
"""

from spinflip.daemon.live.schema.fields import (
    _FIELDS,
    DTYPES,
    MAX_ARRAYS,
    MAX_CHANNELS,
    MAX_DEPTH,
    MAX_DIMS,
    MAX_ERROR_CHARS,
    MAX_FRAME_BYTES,
    MAX_HEADER_BYTES,
    MAX_PAYLOAD_BYTES,
    SCHEMA_VERSION,
    SPECTRUM_ARRAYS,
    TOPICS,
    Message,
    State,
    WireError,
    json_type,
    json_type_words,
    now_utc_iso,
    validate_header,
)
from spinflip.daemon.live.schema.frames import decode, encode

__all__ = ["DTYPES", "MAX_ARRAYS", "MAX_CHANNELS", "MAX_DEPTH", "MAX_DIMS", "MAX_ERROR_CHARS",
           "MAX_FRAME_BYTES", "MAX_HEADER_BYTES", "MAX_PAYLOAD_BYTES", "SCHEMA_VERSION",
           "SPECTRUM_ARRAYS", "State", "TOPICS", "_FIELDS", "Message", "WireError", "decode", "encode",
           "json_type", "json_type_words", "now_utc_iso", "validate_header"]
