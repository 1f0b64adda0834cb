"""Detections and bearing tracks from band power: what is out there, where, and since when.

A streaming stage after band power, pure like the engine (arrays in, plain
values out): :class:`Detector` turns each power row into background-normalised
SNR and peak detections, :class:`BearingTracker` turns one band's detections
into tracks with stable ids.

Background. Two steps, so that neither a passing source nor a fixed one is
taken for the background (both common practice in passive sonar
processing; the combination is ours):

1. a running median of each beam's power over time: the estimate moves by
   a fixed step towards each new row (``10 dB / background_s`` of stream,
   larger while it starts), so a source that covers a beam for less than
   half of the last ``background_s`` or so does not move it, however loud,
   and a change of the noise level is followed at that pace; not updated in
   the cells of a detected lobe and their neighbours (a stochastic-
   approximation quantile estimate; the median of noise's gamma law below
   gives its mean);
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

For adaptive beams the shape above does not hold: within a block their
weights are fixed, so the block power is still a quadratic form in Gaussian
variables, but of a filter (band filter times the adaptive response) that
the weights change. :class:`Detector` then measures the law
(``law="measured"``): a running histogram of the background-normalised
power in dB, in cells outside detected lobes (0.05 dB bins, over the last
``background_s``, refreshed every row), gives the median and the
interquartile range; the gamma shape whose log has that interquartile range
is the fitted shape, and the threshold is the measured median plus that
law's distance from its median to its ``1 - pfa`` quantile. Quartiles, not
the tail: a source that is never detected is a few per cent of the cells,
which would set a tail quantile at its own level (a boat crossing the demo
scene with MVDR beams was never detected that way: the threshold rose to
27 dB) but moves the quartiles by a few per cent of their spread.

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
#: Rows between recomputations of the split-window background (its inputs move by about
#: block / background_s per row).
_BACKGROUND_EVERY = 8
#: The time medians move this far over ``background_s`` (dB), and start with steps of this
#: size over the row count.
_MEDIAN_SPAN_DB = 10.0
_START_STEP_DB = 6.0


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
    acceleration_deg_per_s2: float = 2.0  # σ_a of the tracking index
    max_rate_deg_per_s: float = 20.0  # faster bearing rates are not believed (a track born of two stray detections)

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
        self._left_i, self._right_i = np.maximum(self._left, 0), np.maximum(self._right, 0)
        self._has_left, self._has_right = self._left >= 0, self._right >= 0
        # plain-list copies for the per-detection Python in _peaks
        self._left_list, self._right_list = self._left.tolist(), self._right.tolist()
        self._az_list, self._el_list = self.power_deg[:, 0].tolist(), self.power_deg[:, 1].tolist()
        self.reset()
        self.set_settings(settings)

    def set_settings(self, settings: DetectSettings) -> None:
        self.settings = settings
        self._floor = 10.0 ** (settings.min_snr_db / 10.0)
        self.gamma_threshold = np.array([ratio_threshold(settings.pfa, k) for k in self.shapes])
        rows = max(settings.background_s / self.block_s, 1.0)
        self._step_db = _MEDIAN_SPAN_DB / rows
        # median of Gamma(k, 1/k): the noise's median over its mean, in dB
        self._median_db = np.array([10.0 * math.log10(gamma.median(k, scale=1.0 / k)) for k in self.shapes])
        # the fitted law's threshold above its median (dB) for each shape of _SHAPES
        self._tail_db = 10.0 * np.log10(gamma.isf(settings.pfa, _SHAPES) / gamma.median(_SHAPES))
        self._thr_db = 10.0 * np.log10(self.thresholds)[:, None]

    @property
    def thresholds(self) -> np.ndarray:
        """The ratio threshold of each band now (linear, power over background)."""
        if self.law == "measured" and self._hist is not None and self._hist.sum(axis=1).min() > 0:
            thr = np.array([10.0 ** (self._fitted_threshold_db(h) / 10.0) for h in self._hist])
        else:
            thr = self.gamma_threshold
        return np.maximum(thr, self._floor)

    def reset(self) -> None:
        """Forget the background (after a gap or a change of beams)."""
        self._med, self._rows, self._hist, self._background, self._snr = None, 0, None, None, None

    def update(self, power_db: np.ndarray) -> tuple:
        """One power row.

        Parameters
        ----------
        power_db : ndarray (bands, beams)

        Returns
        -------
        detections : list of dict
            ``band, beam, bearing_deg, elevation_deg, level_db, snr_db`` for each peak.
        crossings : ndarray of bool (bands, beams)
            Cells over the threshold before peak picking (for counting the false-alarm rate).

        The row's SNR of every cell is :attr:`snr_db` afterwards.

        Notes
        -----
        Everything is compared in dB (power over background is a difference),
        a dozen numpy operations per row.
        """
        p_db = np.array(power_db, np.float64).reshape(self.n_bands, self.n_beams)
        # one sum tells whether any value is NaN or infinite (dB values cannot overflow it)
        all_finite = math.isfinite(p_db.sum())
        finite = True
        if not all_finite:
            finite = np.isfinite(p_db)
            p_db[~finite] = -300.0
        self._rows += 1
        warming = self._rows <= WARMUP_ROWS
        if self._med is None:
            self._med = p_db.copy()
        if self._background is None or warming or self._rows % _BACKGROUND_EVERY == 0:
            # the split-window median of the time medians: they move slowly, so every few rows is enough
            half = self._window.shape[1] // 2
            self._background = np.partition(self._med[:, self._window], half, axis=2)[:, :, half] \
                - self._median_db[:, None]
        snr = p_db - self._background
        self._snr = snr
        if warming:
            crossings = np.zeros(snr.shape, bool)
        else:
            if self.law == "measured":
                self._thr_db = 10.0 * np.log10(self.thresholds)[:, None]
            crossings = snr >= self._thr_db
            if not all_finite:
                crossings &= finite
        cells = np.argwhere(crossings).tolist() if crossings.any() else []
        # The time medians step towards this row, not where a lobe was detected (nor beside it).
        move = np.sign(p_db - self._med)
        move *= max(self._step_db, _START_STEP_DB / self._rows)
        if cells or not all_finite or self.law == "measured":
            quiet = np.ones(p_db.shape, bool) if all_finite else finite
            if cells:
                band, beam = np.array(cells).T
                quiet[band, beam] = False
                quiet[band, self._left_i[beam]] &= ~self._has_left[beam]
                quiet[band, self._right_i[beam]] &= ~self._has_right[beam]
            move *= quiet
            if self.law == "measured":
                self._measure(snr, quiet, min(1.0, 1.0 / self._rows + self.block_s / self.settings.background_s))
        self._med += move
        if not cells:
            return [], crossings
        return self._peaks(p_db, cells), crossings

    @property
    def snr_db(self) -> np.ndarray:
        """The last row's power over its background, dB (bands, beams); zeros while warming up."""
        if self._snr is None or self._rows <= WARMUP_ROWS:
            return np.zeros((self.n_bands, self.n_beams))
        return self._snr.copy()

    def _peaks(self, p_db, cells) -> list:
        """Detections at the crossing ``cells`` (band, beam pairs) that are local maxima across the fan.

        Plain Python over the few crossing cells: cheaper than whole-row array operations
        when, as usual, a handful of the beams cross."""
        out = []
        rows, snr = p_db.tolist(), self._snr
        for band, beam in cells:
            row = rows[band]
            level = row[beam]
            lb, rb = self._left_list[beam], self._right_list[beam]
            if (lb >= 0 and row[lb] > level) or (rb >= 0 and row[rb] >= level):
                continue  # not the top of its lobe
            az, el = self._az_list[beam], self._el_list[beam]
            bearing = az
            if lb >= 0 and rb >= 0:
                da, db = self._az_list[lb] - az, self._az_list[rb] - az
                if self.wraps:
                    da, db = _wrap_diff(da), _wrap_diff(db)
                offset, level = _vertex(da, row[lb], level, db, row[rb])
                bearing = az + offset
                bearing = bearing % 360.0 if self.wraps else bearing
            out.append({"band": band, "beam": beam, "bearing_deg": round(bearing, 3), "elevation_deg": el,
                        "level_db": round(level, 3), "snr_db": round(float(snr[band, beam]), 3)})
        return out

    def _fitted_threshold_db(self, hist: np.ndarray) -> float:
        """The measured median plus the fitted gamma law's median-to-tail distance (module notes)."""
        q25, q50, q75 = _quantiles_db(hist, (0.25, 0.5, 0.75))
        # _IQR_DB falls as the shape grows: np.interp wants it rising, hence the reversed tables
        tail_db = np.interp(q75 - q25, _IQR_DB[::-1], self._tail_db[::-1])
        return q50 + float(tail_db)

    def _measure(self, snr_db, quiet, weight) -> None:
        """The running histogram of the normalised power (dB) in quiet cells, for the measured threshold."""
        if self._hist is None:
            self._hist = np.zeros((self.n_bands, len(_HIST_EDGES) - 1))
        self._hist *= 1.0 - weight
        for b in range(self.n_bands):
            db = snr_db[b][quiet[b]]
            self._hist[b] += np.histogram(np.clip(db, _HIST_EDGES[0], _HIST_EDGES[-1] - 1e-9), _HIST_EDGES)[0]


_HIST_EDGES = np.arange(-30.0, 40.0 + 0.05, 0.05)


def _quantiles_db(hist: np.ndarray, qs) -> list:
    """Quantiles ``qs`` of a histogram over _HIST_EDGES, interpolated within a bin."""
    cum = np.concatenate([[0.0], np.cumsum(hist)])
    return [float(np.interp(q * cum[-1], cum, _HIST_EDGES)) for q in qs]


#: Gamma shapes the measured law is fitted among (a block of a few samples' bandwidth up to a
#: time-bandwidth product of 10^5), and the interquartile range of 10 log10 of each (dB).
_SHAPES = np.logspace(-0.5, 5.0, 400)
_IQR_DB = 10.0 * np.log10(gamma.ppf(0.75, _SHAPES) / gamma.ppf(0.25, _SHAPES))


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
        return {"track": self.id, "state": self.state, "bearing_deg": self.bearing % 360.0 if wraps else self.bearing,
                "rate_deg_per_s": self.rate, "snr_db": self.snr_db, "first_sample": self.first_sample,
                "first_utc": self.first_utc, "last_sample": self.last_sample, "last_utc": self.last_utc,
                "detections": self.count}


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

    def __init__(self, settings: DetectSettings, row_s: float, wraps: bool, span_deg: tuple | None = None,
                 resolution_deg: float = 0.0):
        self.row_s, self.wraps = float(row_s), bool(wraps)
        # Two sources closer than this may show as one detection (about the main lobe's width).
        self.resolution_deg = float(resolution_deg)
        self.span_deg = None if wraps or span_deg is None else (float(span_deg[0]), float(span_deg[1]))
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

    def _outside(self, bearing: float) -> bool:
        """A coasting track predicted a gate beyond the fan's edge has left what the beams see."""
        if self.span_deg is None:
            return False
        return bearing < self.span_deg[0] - self.settings.gate_deg or bearing > self.span_deg[1] + self.settings.gate_deg

    def update(self, detections: list, first_sample: int, utc) -> tuple:
        """One power row's detections (of the tracked band). Returns (live tracks as dicts, ended ids)."""
        s = self.settings
        if not self.tracks and not detections:
            return [], []
        m_need, n_window = int(s.confirm[0]), int(s.confirm[1])
        for t in self.tracks:  # predict
            t.bearing += t.rate * self.row_s
        # Tracks closer than a gate or the beams' resolution to another are crossing (or merging):
        # clusters of them.
        n_tracks = len(self.tracks)
        cluster = list(range(n_tracks))

        def root(i):
            while cluster[i] != i:
                cluster[i] = cluster[cluster[i]]
                i = cluster[i]
            return i

        near_deg = max(s.gate_deg, self.resolution_deg)
        for i in range(n_tracks - 1):
            bi = self.tracks[i].bearing
            for j in range(i + 1, n_tracks):
                if abs(self._diff(bi, self.tracks[j].bearing)) < near_deg:
                    cluster[root(i)] = root(j)
        members: dict = {}
        for i in range(n_tracks):
            members.setdefault(root(i), []).append(i)
        crowded = {self.tracks[i].id for group in members.values() if len(group) > 1 for i in group}
        gates = [s.gate_deg * min(1.0 + 0.5 * t.misses, 4.0) for t in self.tracks]
        # Nearest neighbour inside each track's gate (distance over gate), closest pairs first.
        pairs = []
        for ti, t in enumerate(self.tracks):
            for di, d in enumerate(detections):
                dist = abs(self._diff(d["bearing_deg"], t.bearing))
                if dist <= gates[ti]:
                    pairs.append((dist / gates[ti], ti, di))
        # A cluster of crossing tracks with fewer detections in its gates than tracks is not
        # resolved: which track a detection belongs to cannot be told, so none is updated and
        # each coasts on its own course through the crossing (its rate kept); the detections
        # start no new track either.
        coasting_through, used_d = set(), set()
        for group in members.values():
            if len(group) < 2:
                continue
            near = {di for _, ti, di in pairs if ti in group}
            if len(near) < len(group):
                coasting_through.update(group)
                used_d |= near
        pairs = sorted(p for p in pairs if p[1] not in coasting_through and p[2] not in used_d)
        used_t, matched = set(coasting_through), {}
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
                b = 0.0 if t.id in crowded else max(self.beta, 6.0 / (t.n * (t.n + 1)))
                resid = self._diff(det["bearing_deg"], t.bearing)
                t.bearing += a * resid
                limit = s.max_rate_deg_per_s
                t.rate = min(max(t.rate + b * resid / self.row_s, -limit), limit)
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
                elif t.misses * self.row_s > s.coast_s or self._outside(t.bearing):
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


class DetectionStage:
    """Detector and tracker together, row by row: what the service and ``process`` run after band power.

    Parameters
    ----------
    power_deg, band_taps, block_frames, samplerate_hz, settings, lobe_deg, law
        As :class:`Detector`.

    Notes
    -----
    :meth:`rows` takes a :class:`BlockResult`'s power rows with their UTC
    times and returns, per row, the detections of every band and the
    tracks of ``settings.band`` with the ids that ended.
    """

    def __init__(self, power_deg, band_taps, block_frames: int, samplerate_hz: float, settings: DetectSettings,
                 lobe_deg: float = 4.0, law: str = "gamma"):
        self.detector = Detector(power_deg, band_taps, block_frames, samplerate_hz, settings, lobe_deg, law)
        az = np.asarray(power_deg, float).reshape(-1, 2)[:, 0]
        self.tracker = BearingTracker(settings, block_frames / float(samplerate_hz), self.detector.wraps,
                                      (float(az.min()), float(az.max())), resolution_deg=lobe_deg)
        self.settings = settings

    def set_settings(self, settings: DetectSettings) -> None:
        self.settings = settings
        self.detector.set_settings(settings)
        self.tracker.set_settings(settings)

    def rows(self, power_db: np.ndarray, first_samples, utcs) -> list:
        """``[(first_sample, utc, detections, tracks, ended), ...]`` for rows ``power_db`` (K, bands, beams).

        Each detection map also carries ``first_sample`` and ``time_utc``.
        With ``settings.enabled`` false, every row has no detections and no
        tracks (and the tracks alive before end in the first row).
        """
        out = []
        for rows, first, utc in zip(power_db, first_samples, utcs):
            first = int(first)
            if not self.settings.enabled:
                out.append((first, utc, [], [], self.tracker.reset()))
                continue
            dets, _ = self.detector.update(rows)
            for d in dets:
                d["first_sample"], d["time_utc"] = first, utc
            band = min(self.settings.band, self.detector.n_bands - 1)
            tracks, ended = self.tracker.update([d for d in dets if d["band"] == band], first, utc)
            out.append((first, utc, dets, tracks, ended))
        return out
