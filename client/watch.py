"""``beamtap watch``: a live terminal view of the beams.

A bar strip of band power across the fan with the strongest bearing
marked, a scrolling bearing-against-time waterfall (newest row at the top),
the confirmed tracks (their ids over the fan and along their trails in the
waterfall, and a list: id, bearing, rate, SNR, age), and a status line. Plain ANSI escapes only, so it works over ssh; colour
when the terminal has it, plain characters when it does not (or with
``--ascii``). Quit with q or Ctrl-C; the terminal is restored either way.
"""

from __future__ import annotations

import os
import shutil
import signal
import sys
import time

import numpy as np
import zmq

from beamtap import palette
from beamtap.errors import UsageError

from .protocol import valid_track
from .subscriber import Subscriber

ASCII_RAMP = " .:-=+*#%@"
UNICODE_RAMP = " ░▒▓█"
EIGHTHS = " ▁▂▃▄▅▆▇█"
BAR_ROWS = 6
MARGIN = 9
#: How fast the colour scale's top comes down after a loud moment, dB per second (it rises at once).
SCALE_DECAY_DB_PER_S = 0.5


class View:
    """Pure rendering: state in, one screenful of text out (testable without a terminal).

    Parameters
    ----------
    colour : bool
        Use 256-colour backgrounds (beamtap's palette) for the waterfall.
    unicode : bool
        Use block characters; otherwise plain ASCII.
    range_db : float
        Dynamic range shown below the top of the colour scale, dB.
    top_db : float or None
        A fixed top of the colour scale; None adapts it slowly: it rises
        at once to a new peak and comes down by
        :data:`SCALE_DECAY_DB_PER_S`, so the colours of old rows keep their
        meaning from one redraw to the next.
    history_s : float
        Time the waterfall spans, whatever the terminal height: each
        waterfall line is the mean power over ``history_s / lines``.
    """

    def __init__(self, colour: bool, unicode: bool, range_db: float = 30.0, top_db: float | None = None,
                 history_s: float = 120.0):
        self.colour, self.unicode, self.range_db = colour, unicode, range_db
        self.fixed_top, self.history_s = top_db, history_s
        self.scale_top: float | None = top_db
        self._scale_utc: float | None = None
        self.history: list[tuple[float, np.ndarray]] = []  # (utc, linear power), newest first
        self.tracks: list[dict] = []  # the confirmed tracks now
        self.trails: list[tuple[float, int, float]] = []  # (utc, track id, bearing), newest first

    def add_tracks(self, utc: float, tracks: list) -> None:
        """One ``tracks`` message's live tracks at ``utc``: confirmed ones are shown and leave trails."""
        self.tracks = [t for t in tracks if valid_track(t) and t.get("state") == "confirmed"]
        for t in self.tracks:
            self.trails.insert(0, (utc, int(t.get("track", 0)), float(t.get("bearing_deg", 0.0))))
        while self.trails and self.trails[-1][0] < utc - self.history_s:
            self.trails.pop()

    def add_row(self, utc: float, power_db: np.ndarray) -> None:
        """One averaged power row (dB) at ``utc``; rows older than ``history_s`` are forgotten."""
        db = np.asarray(power_db, float)
        if self.history and len(self.history[0][1]) != len(db):
            self.history.clear()  # a new beam table: the old rows do not line up
        self.history.insert(0, (utc, 10.0 ** (db / 10.0)))
        while self.history and self.history[-1][0] < utc - self.history_s:
            self.history.pop()
        peak = float(np.max(db))
        if self.fixed_top is None:
            if self.scale_top is None or peak > self.scale_top:
                self.scale_top = peak
            elif self._scale_utc is not None:
                self.scale_top = max(peak, self.scale_top - SCALE_DECAY_DB_PER_S * max(0.0, utc - self._scale_utc))
            self._scale_utc = utc

    def _columns(self, n_beams: int, width: int) -> np.ndarray:
        return np.round(np.linspace(0, n_beams - 1, width)).astype(int)

    def _level(self, db: np.ndarray) -> np.ndarray:
        top = self.scale_top if self.scale_top is not None else float(np.max(db))
        return np.clip((db - (top - self.range_db)) / self.range_db, 0.0, 1.0)

    def _cells(self, frac: np.ndarray, marks: dict | None = None) -> str:
        """One waterfall line; ``marks`` (column -> character) are drawn over it (track trails)."""
        marks = marks or {}
        if self.colour:
            return "".join(f"\x1b[48;5;{i}m{marks.get(c, ' ')}" for c, i in enumerate(palette.xterm256(frac))) + \
                "\x1b[0m"
        ramp = UNICODE_RAMP if self.unicode else ASCII_RAMP
        return "".join(marks.get(c) or ramp[min(int(f * (len(ramp) - 1) + 0.5), len(ramp) - 1)]
                       for c, f in enumerate(frac))

    def _trail_marks(self, lines: list, az_cols: np.ndarray, now_utc: float) -> list:
        """Per waterfall line, column -> last digit of the id of each track seen in that line's span."""
        span = self.history_s / max(len(lines), 1)
        marks = [{} for _ in lines]
        for utc, tid, bearing in self.trails:
            r = int(np.floor((now_utc - utc) / span))
            if 0 <= r < len(marks):
                marks[r][int(np.argmin(np.abs(az_cols - bearing)))] = str(tid % 10)
        return marks

    def waterfall(self, lines: int, now_utc: float) -> list:
        """(utc of the line's newest moment, mean power dB or None) for ``lines`` lines spanning
        ``history_s`` back from ``now_utc``, newest first."""
        span = self.history_s / max(lines, 1)
        sums, counts = [None] * lines, [0] * lines
        for t, p in self.history:  # one pass: each row into its line
            r = int(np.floor((now_utc - t) / span))  # line r: r spans <= now - t < r + 1 spans
            if 0 <= r < lines:
                sums[r] = p if sums[r] is None else sums[r] + p
                counts[r] += 1
        return [(now_utc - r * span, 10.0 * np.log10(sums[r] / counts[r]) if counts[r] else None)
                for r in range(lines)]

    def render(self, width: int, height: int, title: str, beams_deg: np.ndarray, latest_db: np.ndarray | None,
               status_line: str, mirror_note: bool, now_utc: float | None = None) -> str:
        """The whole screen as text (cursor-home first, each line cleared)."""
        width = max(width, MARGIN + 20)
        plot_w = width - MARGIN
        lines = [title[:width]]
        if latest_db is None or beams_deg is None or len(beams_deg) != len(latest_db):
            lines.append("waiting for power and the beam table …")
            lines += [""] * max(0, height - 3)
            lines += _wrap(status_line, width)
            return _screen([self._plain(line) for line in lines], height)
        cols = self._columns(len(latest_db), plot_w)
        frac = self._level(latest_db[cols])
        top = self.scale_top if self.scale_top is not None else float(np.max(latest_db))
        peak_beam = int(np.argmax(latest_db))
        peak_col = int(np.argmin(np.abs(cols - peak_beam)))
        # Bars: BAR_ROWS rows, eighth-blocks (or '#') for the fractional top.
        for r in range(BAR_ROWS):
            lo = (BAR_ROWS - 1 - r) / BAR_ROWS
            cell = np.clip((frac - lo) * BAR_ROWS, 0.0, 1.0)
            if self.unicode:
                row = "".join(EIGHTHS[int(c * 8)] for c in cell)
            else:
                row = "".join("#" if c >= 0.5 else " " for c in cell)
            label = {0: f"{top:6.1f}dB", BAR_ROWS - 1: f"{top - self.range_db:6.1f}dB"}.get(r, "")
            lines.append(f"{label:>{MARGIN - 1}} " + row)
        az = beams_deg[:, 0]
        marker = [" "] * plot_w
        marker[peak_col] = "^"
        text = f" peak {az[peak_beam]:.1f}° ({latest_db[peak_beam]:.1f} dB)"
        start = min(peak_col + 1, max(0, plot_w - len(text)))
        if start <= peak_col:
            start = max(0, peak_col - len(text))
        for i, ch in enumerate(text):
            if 0 <= start + i < plot_w and start + i != peak_col:
                marker[start + i] = ch
        lines.append(" " * MARGIN + "".join(marker))
        if self.tracks:  # track ids on a line of their own: T7 at its bearing
            ids = [" "] * plot_w
            for t in self.tracks:
                c = int(np.argmin(np.abs(az[cols] - float(t.get("bearing_deg", 0.0)))))
                for i, ch in enumerate(f"T{t.get('track')}"):
                    if c + i < plot_w:
                        ids[c + i] = ch
            lines.append(" " * MARGIN + "".join(ids))
        lines.append(" " * MARGIN + axis(az[cols], plot_w))
        if self.tracks:
            now_t = now_utc if now_utc is not None else time.time()
            lines += _wrap("tracks:  " + "  ".join(_track_text(t, now_t) for t in self.tracks), width)
        note = " (line array: a bearing and its mirror image)" if mirror_note else ""
        lines.append(f"{'UTC':>{MARGIN - 1}} waterfall, newest at top, {self.history_s:g} s{note}"[:width])
        status = _wrap(status_line, width)
        rows_left = max(0, height - len(lines) - len(status))
        now = now_utc if now_utc is not None else (self.history[0][0] if self.history else time.time())
        wf = self.waterfall(rows_left, now)
        trail = self._trail_marks(wf, az[cols], now)
        for (utc, row), marks in zip(wf, trail):
            stamp = time.strftime("%H:%M:%S", time.gmtime(utc))
            cells = self._cells(self._level(row[cols]), marks) if row is not None else " " * plot_w
            lines.append(f"{stamp:>{MARGIN - 1}} " + cells)
        while len(lines) < height - len(status):
            lines.append("")
        lines += status
        return _screen([self._plain(line) for line in lines], height)

    def _plain(self, line: str) -> str:
        """The line in plain ASCII when the terminal cannot show more."""
        if self.unicode:
            return line
        return line.replace("°", "d").replace("…", "...").encode("ascii", "replace").decode("ascii")


def axis(az: np.ndarray, width: int) -> str:
    """Tick marks ('|') at the columns nearest round bearings, labels beside them; a label that
    would run past the right edge goes to the left of its mark."""
    out = [" "] * width
    lo, hi = float(np.min(az)), float(np.max(az))
    step = 45.0 if hi - lo > 90 else 15.0 if hi - lo > 30 else 5.0
    for tick in np.arange(np.ceil(lo / step - 1e-9) * step, hi + 1e-9, step):
        c = int(np.argmin(np.abs(az - tick)))
        label = f"{tick:g}°"
        if c + 1 + len(label) <= width:
            cells = range(c, c + 1 + len(label))
            text = "|" + label
        else:
            cells = range(c - len(label), c + 1)
            text = label + "|"
        if cells.start >= 0 and all(out[i] == " " for i in cells):
            for i, ch in zip(cells, text):
                out[i] = ch
    return "".join(out)


def _track_text(t: dict, now_utc: float) -> str:
    """``#7 118.3° -0.40°/s 14.2 dB 3m02s``: id, bearing, rate, SNR, time since first seen."""
    first = t.get("first_utc")
    age = max(0.0, now_utc - first) if isinstance(first, (int, float)) else None
    age_txt = "" if age is None else f" {int(age // 60)}m{int(age % 60):02d}s"
    return (f"#{t.get('track')} {float(t.get('bearing_deg', 0.0)):.1f}° {float(t.get('rate_deg_per_s', 0.0)):+.2f}°/s "
            f"{float(t.get('snr_db', 0.0)):.1f} dB{age_txt}")


def _wrap(text: str, width: int) -> list:
    """Status text split at double spaces into lines that fit ``width``."""
    lines, cur = [], ""
    for part in text.split("  "):
        part = part.strip()
        if not part:
            continue
        if cur and len(cur) + 2 + len(part) > width:
            lines.append(cur)
            cur = part
        else:
            cur = f"{cur}  {part}" if cur else part
    lines.append(cur[:width])
    return lines


def _screen(lines, height) -> str:
    body = "".join(f"\x1b[{i + 1};1H\x1b[2K{line}" for i, line in enumerate(lines[:height]))
    return body


def _status_line(st: dict | None, last_power, now_utc: float) -> str:
    if not st:
        return "waiting for status …  [q quits]"
    delay = ""
    if last_power is not None:
        delay = f"  delay {1e3 * (now_utc - last_power.time_utc):.0f} ms"
    return (f"overflows {st.get('overflows', 0)}  gaps {st.get('gaps', 0)}  lost {st.get('frames_lost', 0)} frames  "
            f"NaN {st.get('nan_samples', 0)}  clip {st.get('clipped_samples', 0)}  "
            f"block p99 {st.get('block_ms_p99', 0):.2f} ms  D {st.get('bulk_delay_samples', 0)} smp"
            f"{delay}  dropped {st.get('messages_dropped', 0)}  [q quits]")


def terminal_caps(force_ascii: bool) -> tuple[bool, bool]:
    """(colour, unicode) this terminal can show."""
    term = os.environ.get("TERM", "")
    colour = not force_ascii and "NO_COLOR" not in os.environ and term not in ("", "dumb") and (
        "256" in term or "color" in term or term.startswith(("xterm", "screen", "tmux", "rxvt", "linux")))
    enc = (getattr(sys.stdout, "encoding", "") or "").lower()
    unicode = not force_ascii and "utf" in enc
    return colour, unicode


def run(endpoint: str, rate_hz: float, band: int, range_db: float, force_ascii: bool, seconds: float | None,
        history_s: float = 120.0, top_db: float | None = None) -> int:
    for name, value in (("--rate", rate_hz), ("--range-db", range_db), ("--history-s", history_s)):
        if not (isinstance(value, (int, float)) and np.isfinite(value) and value > 0):
            raise UsageError(f"{name} {value!r}: expected a positive number")
    if band < 0:
        raise UsageError(f"--band {band}: expected a band number from 0")
    if top_db is not None and not np.isfinite(top_db):
        raise UsageError(f"--top-db {top_db!r}: expected a number of dB")
    if seconds is not None and not seconds > 0:
        raise UsageError(f"--seconds {seconds!r}: expected a positive number")
    out = sys.stdout
    if not out.isatty():
        # Not a terminal (a pipe, a file, a log): one plain line per redraw, no escape codes.
        return _loop(endpoint, None, rate_hz, band, seconds, {"now": False}, False)
    colour, unicode = terminal_caps(force_ascii)
    view = View(colour, unicode, range_db, top_db, history_s)
    is_tty = sys.stdin.isatty()
    saved = None
    if is_tty:
        import termios  # noqa: PLC0415
        import tty  # noqa: PLC0415

        saved = termios.tcgetattr(sys.stdin.fileno())
        tty.setcbreak(sys.stdin.fileno())
    stop = {"now": False}

    def on_term(signum, frame):
        stop["now"] = True

    old_term = signal.signal(signal.SIGTERM, on_term)
    out.write("\x1b[?1049h\x1b[?25l\x1b[2J")  # alternate screen, hide cursor
    out.flush()
    try:
        return _loop(endpoint, view, rate_hz, band, seconds, stop, is_tty)
    except KeyboardInterrupt:
        return 0
    finally:
        out.write("\x1b[0m\x1b[?25h\x1b[?1049l")  # attributes off, cursor on, main screen back
        out.flush()
        if saved is not None:
            import termios  # noqa: PLC0415

            termios.tcsetattr(sys.stdin.fileno(), termios.TCSADRAIN, saved)
        signal.signal(signal.SIGTERM, old_term)


def _check_band(band: int, beams: dict | None) -> None:
    bands = (beams or {}).get("bands_hz") or []
    if bands and band >= len(bands):
        raise UsageError(f"--band {band}: the service forms {len(bands)} band{'s' if len(bands) > 1 else ''} "
                         f"(0{f' to {len(bands) - 1}' if len(bands) > 1 else ''})")


def _loop(endpoint, view, rate_hz, band, seconds, stop, is_tty) -> int:
    period = 1.0 / rate_hz
    end = None if seconds is None else time.monotonic() + seconds
    sums, count = None, 0
    latest, last_power, status = None, None, None
    next_draw = time.monotonic()
    tracks_now: list = []
    with Subscriber(endpoint, topics=["power", "status", "beams", "tracks"], timeout_s=None) as sub:
        poller = zmq.Poller()
        poller.register(sub.socket, zmq.POLLIN)
        if is_tty:
            poller.register(sys.stdin.fileno(), zmq.POLLIN)
        while not stop["now"]:
            now = time.monotonic()
            if end is not None and now >= end:
                break
            events = dict(poller.poll(int(max(0.0, next_draw - now) * 1000) + 1))
            if is_tty and sys.stdin.fileno() in events:
                key = os.read(sys.stdin.fileno(), 16)
                if b"q" in key or b"Q" in key or b"\x03" in key:
                    break
            while sub.socket in events or sub.socket.poll(0):
                events = {}
                f = sub.recv()
                if f.topic == "beams":
                    _check_band(band, f.header)
                elif f.topic == "power" and f.data is not None and band < f.data.shape[0]:
                    row = f.data[band]
                    lin = 10.0 ** (row / 10.0)
                    sums = lin if sums is None or len(sums) != len(lin) else sums + lin
                    count = 1 if sums is lin else count + 1
                    latest, last_power = row, f
                elif f.topic == "status":
                    status = f.header
                elif f.topic == "tracks" and isinstance(f.data, dict) and f.header.get("band") == band:
                    tracks_now = [t for t in f.data.get("tracks", []) if valid_track(t)]
                    if view is not None:
                        view.add_tracks(f.time_utc, tracks_now)
            if time.monotonic() >= next_draw:
                beams = sub.beams
                az = np.asarray(beams["power_deg"]) if beams else None
                if view is None:  # plain text
                    if latest is not None and az is not None and len(az) == len(latest):
                        i = int(np.argmax(latest))
                        confirmed = [t for t in tracks_now if t.get("state") == "confirmed"]
                        listed = "".join(f"  {_track_text(t, last_power.time_utc)}" for t in confirmed)
                        sys.stdout.write(f"{time.strftime('%Y-%m-%dT%H:%M:%SZ', time.gmtime(last_power.time_utc))} "
                                         f"peak {az[i][0]:.1f} deg {latest[i]:.1f} dB band {band}"
                                         f"{listed.replace('°', ' deg')}\n")
                        sys.stdout.flush()
                    next_draw = time.monotonic() + period
                    continue
                if sums is not None and count:
                    view.add_row(last_power.time_utc, 10.0 * np.log10(sums / count))
                    sums, count = None, 0
                bands = beams.get("bands_hz") if beams else None
                band_txt = f"band {bands[band][0]:g}-{bands[band][1]:g} Hz" if bands and band < len(bands) else ""
                title = f"beamtap watch  {endpoint}  {band_txt}  {beams.get('array_kind', '') if beams else ''} array"
                size = shutil.get_terminal_size((80, 30))
                screen = view.render(size.columns, size.lines, title, az, latest,
                                     _status_line(status, last_power, time.time()),
                                     bool(beams and beams.get("array_kind") == "line"),
                                     now_utc=last_power.time_utc if last_power is not None else None)
                sys.stdout.write(screen)
                sys.stdout.flush()
                next_draw = time.monotonic() + period
    return 0
