"""``beamtap watch``: a live terminal view of the beams.

A bar strip of band power across the fan with the strongest bearing
marked, a scrolling bearing-against-time waterfall (newest row at the top),
and a status line. Plain ANSI escapes only, so it works over ssh; colour
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

from .subscriber import Subscriber

ASCII_RAMP = " .:-=+*#%@"
UNICODE_RAMP = " ░▒▓█"
EIGHTHS = " ▁▂▃▄▅▆▇█"
#: 256-colour heat ramp (dark blue → cyan → yellow → red), used as cell backgrounds.
HEAT = [17, 18, 19, 20, 21, 27, 33, 39, 45, 51, 50, 49, 48, 47, 46, 82, 118, 154, 190, 226, 220, 214, 208, 202,
        196]

BAR_ROWS = 6


class View:
    """Pure rendering: state in, one screenful of text out (testable without a terminal).

    Parameters
    ----------
    colour : bool
        Use 256-colour backgrounds for the waterfall and bars.
    unicode : bool
        Use block characters; otherwise plain ASCII.
    range_db : float
        Dynamic range shown below the current peak.
    """

    def __init__(self, colour: bool, unicode: bool, range_db: float = 30.0):
        self.colour, self.unicode, self.range_db = colour, unicode, range_db
        self.history: list[tuple[float, np.ndarray]] = []

    def add_row(self, utc: float, power_db: np.ndarray, keep: int = 500) -> None:
        self.history.insert(0, (utc, np.asarray(power_db, float)))
        del self.history[keep:]

    def _columns(self, n_beams: int, width: int) -> np.ndarray:
        return np.round(np.linspace(0, n_beams - 1, width)).astype(int)

    def _level(self, db: np.ndarray, top: float) -> np.ndarray:
        return np.clip((db - (top - self.range_db)) / self.range_db, 0.0, 1.0)

    def _cells(self, frac: np.ndarray) -> str:
        if self.colour:
            idx = np.minimum((frac * (len(HEAT) - 1)).round().astype(int), len(HEAT) - 1)
            return "".join(f"\x1b[48;5;{HEAT[i]}m " for i in idx) + "\x1b[0m"
        ramp = UNICODE_RAMP if self.unicode else ASCII_RAMP
        return "".join(ramp[min(int(f * (len(ramp) - 1) + 0.5), len(ramp) - 1)] for f in frac)

    def render(self, width: int, height: int, title: str, beams_deg: np.ndarray, latest_db: np.ndarray | None,
               status_line: str, mirror_note: bool) -> str:
        """The whole screen as text (cursor-home first, each line cleared)."""
        margin = 9
        width = max(width, margin + 20)
        plot_w = width - margin
        lines = [title[:width]]
        if latest_db is None or beams_deg is None or len(beams_deg) != len(latest_db):
            lines.append("waiting for power and the beam table …")
            lines += [""] * max(0, height - 3)
            lines.append(status_line[:width])
            return _screen([self._plain(line) for line in lines], height)
        cols = self._columns(len(latest_db), plot_w)
        top = float(np.max(latest_db))
        frac = self._level(latest_db[cols], top)
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
            lines.append(f"{label:>{margin - 1}} " + row)
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
        lines.append(" " * margin + "".join(marker))
        lines.append(" " * margin + _axis(az[cols], plot_w))
        note = "  (a line array: each bearing also stands for its mirror image about the axis)" if mirror_note else ""
        lines.append(f"{'':{margin}}waterfall, newest at top{note}"[:width])
        rows_left = max(0, height - len(lines) - 1)
        for utc, row in self.history[:rows_left]:
            if len(row) != len(latest_db):
                continue
            stamp = time.strftime("%H:%M:%S", time.gmtime(utc))
            lines.append(f"{stamp:>{margin - 1}} " + self._cells(self._level(row[cols], top)))
        while len(lines) < height - 1:
            lines.append("")
        lines.append(status_line[:width])
        return _screen([self._plain(line) for line in lines], height)

    def _plain(self, line: str) -> str:
        """The line in plain ASCII when the terminal cannot show more."""
        if self.unicode:
            return line
        return line.replace("°", "d").replace("…", "...").encode("ascii", "replace").decode("ascii")


def _axis(az: np.ndarray, width: int) -> str:
    out = [" "] * width
    lo, hi = float(az[0]), float(az[-1])
    step = 45.0 if hi - lo > 90 else 15.0 if hi - lo > 30 else 5.0
    for tick in np.arange(np.ceil(lo / step) * step, hi + 1e-9, step):
        c = int(np.argmin(np.abs(az - tick)))
        label = f"|{tick:g}°"
        if c + len(label) > width:
            c = width - len(label)
        if all(ch == " " for ch in out[c:c + len(label)]):
            out[c:c + len(label)] = list(label)
    return "".join(out)


def _screen(lines, height) -> str:
    body = "".join(f"\x1b[{i + 1};1H\x1b[2K{line}" for i, line in enumerate(lines[:height]))
    return body


def _status_line(st: dict | None, last_power, now_utc: float) -> str:
    if not st:
        return "waiting for status …   [q quits]"
    delay = ""
    if last_power is not None:
        delay = f"  delay {1e3 * (now_utc - last_power.time_utc):.0f} ms"
    return (f"overflows {st.get('overflows', 0)}  gaps {st.get('gaps', 0)}  lost {st.get('frames_lost', 0)} frames  "
            f"NaN {st.get('nan_samples', 0)}  clip {st.get('clipped_samples', 0)}  "
            f"block p99 {st.get('block_ms_p99', 0):.2f} ms  D {st.get('bulk_delay_samples', 0)} smp"
            f"{delay}  dropped {st.get('messages_dropped', 0)}   [q quits]")


def terminal_caps(force_ascii: bool) -> tuple[bool, bool]:
    """(colour, unicode) this terminal can show."""
    term = os.environ.get("TERM", "")
    colour = not force_ascii and "NO_COLOR" not in os.environ and term not in ("", "dumb") and (
        "256" in term or "color" in term or term.startswith(("xterm", "screen", "tmux", "rxvt", "linux")))
    enc = (getattr(sys.stdout, "encoding", "") or "").lower()
    unicode = not force_ascii and "utf" in enc
    return colour, unicode


def run(endpoint: str, rate_hz: float, band: int, range_db: float, force_ascii: bool, seconds: float | None) -> int:
    colour, unicode = terminal_caps(force_ascii)
    view = View(colour, unicode, range_db)
    out = sys.stdout
    is_tty = out.isatty() and sys.stdin.isatty()
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


def _loop(endpoint, view, rate_hz, band, seconds, stop, is_tty) -> int:
    period = 1.0 / max(rate_hz, 0.5)
    end = None if seconds is None else time.monotonic() + seconds
    sums, count = None, 0
    latest, last_power, status = None, None, None
    next_draw = time.monotonic()
    with Subscriber(endpoint, topics=["power", "status", "beams"], timeout_s=None) as sub:
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
                if f.topic == "power" and f.data is not None:
                    row = f.data[min(band, f.data.shape[0] - 1)]
                    lin = 10.0 ** (row / 10.0)
                    sums = lin if sums is None or len(sums) != len(lin) else sums + lin
                    count = 1 if sums is lin else count + 1
                    latest, last_power = row, f
                elif f.topic == "status":
                    status = f.header
            if time.monotonic() >= next_draw:
                if sums is not None and count:
                    view.add_row(last_power.time_utc, 10.0 * np.log10(sums / count))
                    sums, count = None, 0
                beams = sub.beams
                az = np.asarray(beams["power_deg"]) if beams else None
                bands = beams.get("bands_hz") if beams else None
                band_txt = f"band {bands[min(band, len(bands) - 1)][0]:g}-{bands[min(band, len(bands) - 1)][1]:g} Hz" \
                    if bands else ""
                title = f"beamtap watch  {endpoint}  {band_txt}  {beams.get('array_kind', '') if beams else ''} array"
                size = shutil.get_terminal_size((100, 30))
                screen = view.render(size.columns, size.lines, title, az, latest, _status_line(status, last_power,
                                                                                                time.time()),
                                     bool(beams and beams.get("array_kind") == "line"))
                sys.stdout.write(screen)
                sys.stdout.flush()
                next_draw = time.monotonic() + period
    return 0
