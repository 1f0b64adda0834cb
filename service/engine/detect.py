"""Detections and bearing tracks from band power: what is out there, where, and since when.

A streaming stage after band power, pure like the engine (arrays in, plain
values out): :class:`Detector` turns each power row into background-normalised
SNR and peak detections, :class:`BearingTracker` turns one band's detections
into tracks with stable ids.

Background. Two steps, so that neither a passing source nor a fixed one is
taken for the background (both common practice in passive sonar
processing; the combination is ours):

1. a long exponential average of each beam's power over time (time constant
   ``background_s``), not updated in the cells of a detected lobe and their
   neighbours, so a source that stops on a bearing does not drag its beam's
   average up while it is detected;
2. a split window across beams: the background of beam ``i`` is the median
   of the averages of the beams ``guard + 1 .. guard + window`` away on
   either side, so the lobe of a source that was there from the start (and
   so is in the averages of its own beams) stays out of its own background.

The SNR is the block's power over that background, in dB.

Threshold. For noise that is Gaussian and spatially white, a beam's output
is Gaussian noise and its band power over a block of ``N`` samples is the
mean of ``z[n]^2``, ``z`` the band filter's output: a quadratic form in
Gaussian variables, close to a gamma (scaled chi-square) law. Matching its
first two moments (Satterthwaite 1946) gives the shape

    k = (N r(0))^2 / (2 sum_{|m|<N} (N - |m|) r(m)^2),

``r`` the autocorrelation of the filter's taps (``k`` is close to the
time-bandwidth product B·T of the block). The power over its mean is then
Gamma(k, 1/k), and a beam and block cross the threshold with probability
``pfa`` when the ratio to the background exceeds ``scipy.stats.gamma.isf(pfa,
k, scale=1/k)`` (the chi-square detector of any detection-theory text, e.g.
Kay 1998, Fundamentals of Statistical Signal Processing vol. II, ch. 2 and
5). ``min_snr_db`` sets a floor under it.

For adaptive beams that law does not hold (their output power is not a
fixed quadratic form of the input); :class:`Detector` then sets the ratio
threshold at the ``1 - pfa`` quantile of the background-normalised power it
has measured in cells outside detected lobes (``law="measured"``): a
running histogram of the ratio in dB, 0.05 dB bins, over the last
``background_s``, refreshed every row.

Peaks. A detection is a beam that crosses the threshold and is a local
maximum of power among its neighbours across the fan (one per lobe). Its
bearing is refined by the vertex of the parabola through the peak and its
two neighbours in dB (common practice), its level is that vertex's value.

Tracks. :class:`BearingTracker` associates detections of one band with
tracks by nearest neighbour inside a gate around each track's predicted
bearing (wider while a track coasts), smooths bearing and bearing rate by
an alpha-beta filter, confirms a track when M of its last N updates had a
detection, lets a confirmed track coast (predicted on) for up to
``coast_s`` without one and then ends it. The filter starts with the gains
of a growing-memory least-squares fit of a straight line (2(2n-1)/(n(n+1)),
6/(n(n+1))) and settles at the steady-state gains for the tracking index
λ = σ_a T^2 / σ_b (σ_a the bearing acceleration, σ_b the bearing error,
T the row interval): α from λ by Kalata (1984), β = 2(2 - α) - 4√(1 - α),
the gains of the steady-state Kalman filter of a constant-velocity target
with piecewise-constant white acceleration.

References
----------
F. E. Satterthwaite, "An approximate distribution of estimates of variance
components", Biometrics Bulletin 2(6), 1946.
S. M. Kay, Fundamentals of Statistical Signal Processing, Vol. II: Detection
Theory (Prentice Hall, 1998).
P. R. Kalata, "The tracking index: a generalized parameter for α-β and α-β-γ
target trackers", IEEE Trans. AES 20(2), 1984.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
from scipy.stats import gamma

#: Track states, as published.
TENTATIVE, CONFIRMED, COASTING = "tentative", "confirmed", "coasting"
#: Rows averaged before anything is reported: the background needs a few to mean anything.
WARMUP_ROWS = 8


@dataclass(frozen=True)
class DetectSettings:
    """``[detect]``: detection and tracking settings (validated by the config loader)."""

    enabled: bool = True
    pfa: float = 1e-4  # per beam and power block
    band: int = 0  # the band the tracker follows (detections are reported for every band)
    background_s: float = 20.0
    gate_deg: float = 4.0
    confirm: tuple = (3, 5)  # M of N
    coast_s: float = 8.0
    min_snr_db: float = 6.0
    bearing_error_deg: float = 0.5  # σ_b of the tracking index
    acceleration_deg_per_s2: float = 0.2  # σ_a of the tracking index

    def as_dict(self) -> dict:
        return {"enabled": self.enabled, "pfa": self.pfa, "band": self.band, "background_s": self.background_s,
                "gate_deg": self.gate_deg, "confirm": list(self.confirm), "coast_s": self.coast_s,
                "min_snr_db": self.min_snr_db}

    def with_changes(self, **changes) -> "DetectSettings":
        if "confirm" in changes:
            changes["confirm"] = tuple(changes["confirm"])
        return replace(self, **changes)


def gamma_shape(taps: np.ndarray, block_frames: int) -> float:
    """Shape ``k`` of the gamma law of a block's band power for white Gaussian input (Satterthwaite
    1946: the gamma with the quadratic form's mean and variance)."""
    taps = np.asarray(taps, np.float64)
    n = int(block_frames)
    r = np.correlate(taps, taps, "full")  # lags -(L-1) .. L-1
    lags = np.arange(-(len(taps) - 1), len(taps))
    keep = np.abs(lags) < n
    var_sum = np.sum((n - np.abs(lags[keep])) * r[keep] ** 2)
    return float((n * r[len(taps) - 1]) ** 2 / (2.0 * var_sum))


def ratio_threshold(pfa: float, shape: float) -> float:
    """Power over its mean that noise alone exceeds with probability ``pfa``: Gamma(k, 1/k)'s upper quantile."""
    return float(gamma.isf(pfa, shape, scale=1.0 / shape))


class Detector:
    """Background-normalised SNR and peak detections per power row.

    Parameters
    ----------
    power_deg : ndarray (beams, 2)
        The power fan's (azimuth, elevation) in degrees, in the engine's beam order.
    band_taps : list of ndarray
        Each band's filter taps (the engine's band filters).
    block_frames : int
        Power block length (samples).
    samplerate_hz : float
    settings : DetectSettings
    lobe_deg : float
        Main-lobe width to keep out of a beam's own background (the guard of
        the split window), e.g. the -3 dB beamwidth at the band centre.
    law : {"gamma", "measured"}
        Where the threshold comes from (see the module notes); "measured" for adaptive beams.

    Notes
    -----
    :meth:`update` costs a few dozen numpy operations per row, independent of
    the number of sources; rows are processed in the order given.
    """

    def __init__(self, power_deg, band_taps, block_frames: int, samplerate_hz: float, settings: DetectSettings,
                 lobe_deg: float = 4.0, law: str = "gamma"):
        if law not in ("gamma", "measured"):
            raise ValueError(f"law={law!r}: expected 'gamma' or 'measured'")
        self.settings, self.law = settings, law
        self.power_deg = np.asarray(power_deg, np.float64).reshape(-1, 2)
        self.n_beams, self.n_bands = len(self.power_deg), len(band_taps)
        self.block_s = block_frames / float(samplerate_hz)
        self.shapes = np.array([gamma_shape(t, block_frames) for t in band_taps])
        self._left, self._right, self.wraps = _neighbours(self.power_deg)
        step = _typical_step(self.power_deg)
        guard = max(1, int(math.ceil(0.75 * lobe_deg / step))) if step > 0 else 1
        self._window = _split_window(self._left, self._right, guard, window=max(4, 2 * guard))
        self._avg = None  # per band and beam: the time average of linear power
        self._rows = 0
        self._hist = None
        self.set_settings(settings)

    def set_settings(self, settings: DetectSettings) -> None:
        self.settings = settings
        floor = 10.0 ** (settings.min_snr_db / 10.0)
        self.gamma_threshold = np.array([ratio_threshold(settings.pfa, k) for k in self.shapes])
        self._floor = floor

    @property
    def thresholds(self) -> np.ndarray:
        """The ratio threshold of each band now (linear, power over background)."""
        if self.law == "measured" and self._hist is not None and self._hist.sum(axis=1).min() > 0:
            thr = np.array([10.0 ** (_quantile_db(h, 1.0 - self.settings.pfa) / 10.0) for h in self._hist])
        else:
            thr = self.gamma_threshold
        return np.maximum(thr, self._floor)

    def reset(self) -> None:
        """Forget the background (after a gap or a change of beams)."""
        self._avg, self._rows, self._hist = None, 0, None

    def update(self, power_db: np.ndarray) -> tuple:
        """One power row.

        Parameters
        ----------
        power_db : ndarray (bands, beams)

        Returns
        -------
        snr_db : ndarray (bands, beams)
            Power over the background, dB (zeros while the background warms up).
        detections : list of dict
            ``band, beam, bearing_deg, elevation_deg, level_db, snr_db`` for each peak.
        crossings : ndarray of bool (bands, beams)
            Cells over the threshold before peak picking (for counting the false-alarm rate).
        """
        p_db = np.asarray(power_db, np.float64).reshape(self.n_bands, self.n_beams)
        bad = ~np.isfinite(p_db)
        p = 10.0 ** (np.where(bad, -300.0, p_db) / 10.0)
        self._rows += 1
        if self._avg is None:
            self._avg = p.copy()
        background = np.median(self._avg[:, self._window], axis=2)
        ratio = p / np.maximum(background, 1e-300)
        ready = self._rows > WARMUP_ROWS
        thr = self.thresholds[:, None]
        crossings = (ratio >= thr) & ~bad & ready
        # The time average: not where a lobe was detected (and the neighbours of such cells).
        busy = crossings | crossings[:, np.maximum(self._left, 0)] & (self._left >= 0)
        busy |= crossings[:, np.maximum(self._right, 0)] & (self._right >= 0)
        weight = max(1.0 / self._rows, 1.0 - math.exp(-self.block_s / self.settings.background_s))
        quiet = ~busy & ~bad
        self._avg[quiet] += weight * (p[quiet] - self._avg[quiet])
        if self.law == "measured":
            self._measure(ratio, quiet, weight)
        snr_db = 10.0 * np.log10(np.maximum(ratio, 1e-30)) if ready else np.zeros_like(ratio)
        if not crossings.any():
            return snr_db, [], crossings
        return snr_db, self._peaks(p_db, snr_db, crossings), crossings

    def _peaks(self, p_db, snr_db, crossings) -> list:
        left_db = np.where(self._left >= 0, p_db[:, np.maximum(self._left, 0)], -np.inf)
        right_db = np.where(self._right >= 0, p_db[:, np.maximum(self._right, 0)], -np.inf)
        peaks = crossings & (p_db >= left_db) & (p_db > right_db)
        out = []
        for band, beam in zip(*np.nonzero(peaks)):
            az, el = self.power_deg[beam]
            bearing, level = float(az), float(p_db[band, beam])
            lb, rb = self._left[beam], self._right[beam]
            if lb >= 0 and rb >= 0:
                da = _wrap_diff(self.power_deg[lb, 0] - az) if self.wraps else self.power_deg[lb, 0] - az
                db = _wrap_diff(self.power_deg[rb, 0] - az) if self.wraps else self.power_deg[rb, 0] - az
                offset, level = _vertex(da, p_db[band, lb], p_db[band, beam], db, p_db[band, rb])
                bearing = float(az + offset)
                bearing = bearing % 360.0 if self.wraps else bearing
            out.append({"band": int(band), "beam": int(beam), "bearing_deg": round(bearing, 3),
                        "elevation_deg": float(el), "level_db": round(float(level), 3),
                        "snr_db": round(float(snr_db[band, beam]), 3)})
        return out

    def _measure(self, ratio, quiet, weight) -> None:
        """The running histogram of the ratio (dB) in quiet cells, for the measured threshold."""
        if self._hist is None:
            self._hist = np.zeros((self.n_bands, len(_HIST_EDGES) - 1))
        self._hist *= 1.0 - weight
        for b in range(self.n_bands):
            db = 10.0 * np.log10(np.maximum(ratio[b][quiet[b]], 1e-30))
            self._hist[b] += np.histogram(np.clip(db, _HIST_EDGES[0], _HIST_EDGES[-1] - 1e-9), _HIST_EDGES)[0]


_HIST_EDGES = np.arange(-30.0, 40.0 + 0.05, 0.05)


def _quantile_db(hist: np.ndarray, q: float) -> float:
    cum = np.cumsum(hist)
    i = int(np.searchsorted(cum, q * cum[-1]))
    return float(_HIST_EDGES[min(i + 1, len(_HIST_EDGES) - 1)])


def _wrap_diff(d):
    return (d + 180.0) % 360.0 - 180.0


def _vertex(da, ya, y0, db, yb) -> tuple:
    """Vertex (x, y) of the parabola through (da, ya), (0, y0), (db, yb); da < 0 < db. Falls back to
    (0, y0) when the three points do not bend downwards."""
    # y = y0 + c1 x + c2 x^2 through the two neighbours
    den = da * db * (da - db)
    if den == 0:
        return 0.0, float(y0)
    c2 = ((ya - y0) * db - (yb - y0) * da) / den
    c1 = ((yb - y0) * da * da - (ya - y0) * db * db) / den
    if c2 >= 0:
        return 0.0, float(y0)
    x = -c1 / (2.0 * c2)
    x = min(max(x, da / 2.0), db / 2.0)  # never past half way to a neighbour
    return float(x), float(y0 + c1 * x + c2 * x * x)


def _neighbours(power_deg: np.ndarray) -> tuple:
    """Left and right neighbour of each beam across the fan (-1 for none), and whether azimuth wraps.

    Beams are grouped by elevation and ordered by azimuth in each group
    (a fan is one group, a grid one per elevation); a group that covers the
    whole circle wraps around.
    """
    n = len(power_deg)
    left, right = np.full(n, -1), np.full(n, -1)
    wraps = False
    for el in np.unique(np.round(power_deg[:, 1], 6)):
        idx = np.nonzero(np.round(power_deg[:, 1], 6) == el)[0]
        idx = idx[np.argsort(power_deg[idx, 0] % 360.0 if _covers_circle(power_deg[idx, 0]) else power_deg[idx, 0])]
        left[idx[1:]], right[idx[:-1]] = idx[:-1], idx[1:]
        if len(idx) > 2 and _covers_circle(power_deg[idx, 0]):
            left[idx[0]], right[idx[-1]] = idx[-1], idx[0]
            wraps = True
    return left, right, wraps


def _covers_circle(az: np.ndarray) -> bool:
    if len(az) < 3:
        return False
    a = np.sort(az % 360.0)
    gaps = np.diff(np.concatenate([a, [a[0] + 360.0]]))
    return bool(gaps.max() <= 1.5 * np.median(gaps))


def _typical_step(power_deg: np.ndarray) -> float:
    steps = []
    _, right, wraps = _neighbours(power_deg)
    for i, r in enumerate(right):
        if r >= 0:
            d = power_deg[r, 0] - power_deg[i, 0]
            steps.append(abs(_wrap_diff(d)) if wraps else abs(d))
    return float(np.median(steps)) if steps else 0.0


def _split_window(left, right, guard: int, window: int) -> np.ndarray:
    """Indices (beams, 2 window) of each beam's background cells: ``guard + 1 .. guard + window``
    neighbours away on each side; where a side runs out, the other side goes further (so every
    beam has the same number of cells)."""
    n = len(left)
    out = np.empty((n, 2 * window), np.int64)
    for i in range(n):
        sides = []
        for step in (left, right):
            walk, j = [], i
            for _ in range(guard + 2 * window):
                j = step[j]
                if j < 0 or j == i:
                    break
                walk.append(j)
            sides.append(walk[guard:])
        a, b = sides
        take_a = min(len(a), max(window, 2 * window - len(b)))
        cells = a[:take_a] + b[:2 * window - take_a]
        if not cells:  # a fan too short for a window: every other beam
            cells = [j for j in range(n) if j != i] or [i]
        out[i] = np.resize(np.array(cells), 2 * window)
    return out


def alpha_beta_gains(tracking_index: float) -> tuple:
    """Steady-state (α, β) for a tracking index λ (Kalata 1984): α from λ, β = 2(2 - α) - 4√(1 - α)."""
    lam = float(tracking_index)
    alpha = -(lam * lam + 8.0 * lam - (lam + 4.0) * math.sqrt(lam * lam + 8.0 * lam)) / 8.0
    beta = 2.0 * (2.0 - alpha) - 4.0 * math.sqrt(1.0 - alpha)
    return alpha, beta


class _Track:
    __slots__ = ("id", "bearing", "rate", "n", "hits", "state", "first_sample", "first_utc", "last_sample",
                 "last_utc", "count", "snr_db", "misses")

    def __init__(self, tid, det, first_sample, utc, n_window):
        self.id, self.bearing, self.rate, self.n = tid, det["bearing_deg"], 0.0, 1
        self.hits = [True] + [False] * 0
        self.state = TENTATIVE
        self.first_sample, self.first_utc = first_sample, utc
        self.last_sample, self.last_utc = first_sample, utc
        self.count, self.snr_db, self.misses = 1, det["snr_db"], 0

    def as_dict(self, wraps: bool) -> dict:
        b = self.bearing % 360.0 if wraps else self.bearing
        return {"track": self.id, "state": self.state, "bearing_deg": round(float(b), 3),
                "rate_deg_per_s": round(float(self.rate), 4), "snr_db": round(float(self.snr_db), 3),
                "first_sample": int(self.first_sample), "first_utc": self.first_utc,
                "last_sample": int(self.last_sample), "last_utc": self.last_utc, "detections": int(self.count)}


class BearingTracker:
    """Bearing-only tracks of one band's detections (see the module notes).

    Parameters
    ----------
    settings : DetectSettings
    row_s : float
        Seconds between power rows (the block).
    wraps : bool
        Bearings are on a circle (0-360°); else on a line of azimuths (a
        line array's 0-180°).
    """

    def __init__(self, settings: DetectSettings, row_s: float, wraps: bool):
        self.row_s, self.wraps = float(row_s), bool(wraps)
        self.tracks: list[_Track] = []
        self._next_id = 1
        self.set_settings(settings)

    def set_settings(self, settings: DetectSettings) -> None:
        self.settings = settings
        lam = settings.acceleration_deg_per_s2 * self.row_s ** 2 / settings.bearing_error_deg
        self.alpha, self.beta = alpha_beta_gains(lam)

    def reset(self) -> list:
        """End every track (after a gap or a change of beams); returns their ids."""
        ended = [t.id for t in self.tracks]
        self.tracks = []
        return ended

    def _diff(self, a, b):
        return _wrap_diff(a - b) if self.wraps else a - b

    def update(self, detections: list, first_sample: int, utc) -> tuple:
        """One power row's detections (of the tracked band). Returns (live tracks as dicts, ended ids)."""
        s = self.settings
        m_need, n_window = int(s.confirm[0]), int(s.confirm[1])
        for t in self.tracks:  # predict
            t.bearing += t.rate * self.row_s
        # Nearest neighbour inside each track's gate, closest pairs first.
        pairs = []
        for ti, t in enumerate(self.tracks):
            gate = s.gate_deg * min(1.0 + 0.5 * t.misses, 4.0)
            for di, d in enumerate(detections):
                dist = abs(self._diff(d["bearing_deg"], t.bearing))
                if dist <= gate:
                    pairs.append((dist, ti, di))
        pairs.sort()
        used_t, used_d, matched = set(), set(), {}
        for _, ti, di in pairs:
            if ti not in used_t and di not in used_d:
                used_t.add(ti), used_d.add(di)
                matched[ti] = detections[di]
        ended, kept = [], []
        for ti, t in enumerate(self.tracks):
            det = matched.get(ti)
            t.hits = (t.hits + [det is not None])[-n_window:]
            if det is not None:
                t.n += 1
                # growing-memory gains first, then the steady state
                a = max(self.alpha, 2.0 * (2 * t.n - 1) / (t.n * (t.n + 1)))
                b = max(self.beta, 6.0 / (t.n * (t.n + 1)))
                resid = self._diff(det["bearing_deg"], t.bearing)
                t.bearing += a * resid
                t.rate += b * resid / self.row_s
                t.misses, t.count, t.snr_db = 0, t.count + 1, det["snr_db"]
                t.last_sample, t.last_utc = first_sample, utc
                if t.state != CONFIRMED and sum(t.hits) >= m_need:
                    t.state = CONFIRMED
            else:
                t.misses += 1
                if t.state == TENTATIVE:
                    if len(t.hits) - sum(t.hits) > n_window - m_need:
                        ended.append(t.id)
                        continue
                elif t.misses * self.row_s > s.coast_s:
                    ended.append(t.id)
                    continue
                else:
                    t.state = COASTING
            if self.wraps:
                t.bearing %= 360.0
            kept.append(t)
        for di, d in enumerate(detections):
            if di not in used_d:
                kept.append(_Track(self._next_id, d, first_sample, utc, n_window))
                self._next_id += 1
        self.tracks = kept
        return [t.as_dict(self.wraps) for t in self.tracks], ended
