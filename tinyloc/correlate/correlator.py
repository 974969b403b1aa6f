"""The rotational correlator: every heading and every shift of a bird's-eye grid against a map window.

Usage::

    corr = Correlator(CorrelatorParams())      # allocates every working buffer once
    corr.set_map(window)                       # (C, H, W) map channels; once per window
    res = corr.search(bev)                     # exact, all headings x all cells
    res = corr.search_fast(bev)                # coarse-to-fine full search (modes exact at full resolution)
    trk = corr.track(bev, row, col, a)         # +-10 m, +-20 deg around a prior, full resolution

Geometry (docs/interfaces.md): heading index a <-> yaw ``wrap_angle(a * 2 pi / A)``;
window cell (i, j) <-> robot origin at the centre of that cell. The bird's-eye grid
is rotated by +yaw (counter-clockwise in the north-up map) about the robot origin
and sampled bilinearly onto the map's cell lattice around the robot cell; the score
is then an exact integer-shift correlation, with map cells outside the window
counting as zero (unknown).

Algorithm (full search). Per feature f the map side ``G_f`` is zero-padded to
N x N (N >= window + template reach, so nothing wraps) and transformed once per
window, for each of the four exact quarter turns of the map. A quarter turn of
the lattice is exact, so the template of heading a + A/4 is the template of
heading a turned by 90 degrees, and correlating it with the map equals
correlating the unturned template with the turned map. Hence only A/4 rotated
templates are transformed (forward FFTs along the template's occupied rows only);
each feeds four headings. The feature products are summed in the frequency domain
so each heading costs one inverse FFT, of which only the rows that land in the
window are finished.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..classes import NUM_MAP_CLASSES
from ..errors import InputError
from ..frames import wrap_angle
from . import _kernels as K
from .peaks import Mode, PeakWork, coarse_start, find_modes, modes_of_volume, refine_mode
from .scoring import ScoringModel


@dataclass(frozen=True)
class CorrelatorParams:
    """Parameters of the correlator (sizes in cells of the map's resolution).

    Attributes
    ----------
    n_headings : int
        Headings over the full circle (A); a multiple of 8. 256 gives 1.41 deg steps.
    window_shape : (int, int)
        Map window (H, W) searched in full; both even.
    bev_shape : (int, int)
        Bird's-eye grid (h, w); both even.
    origin_row, origin_col : float
        Robot origin in the bird's-eye grid (continuous cells).
    res_m : float
        Cell size of map and bird's-eye grid (m).
    n_modes : int
        Modes returned (non-maximum suppressed, best first).
    mode_radius_cells, mode_radius_headings : int
        Non-maximum suppression radius in cells (x, y) and in heading steps.
    coarse_top_k : int
        Hypotheses of the 2x-coarse search refined at full resolution (fast search).
    coarse_climb : int
        Of those, the best (by the exact score under them) climbed to a local maximum.
    coarse_heading_step : int
        Heading step of the coarse full search, in full steps (1 or 2).
    track_radius_cells : int
        Half size of the tracking window (cells); 20 = +-10 m at 0.5 m.
    track_half_headings : int
        Headings each side of the prior in tracking; 15 = +-21 deg at A = 256.
    track_refine : int
        Modes of the coarse tracking volume refined at full resolution.
    threads : int
        Threads of the full searches (1 or 2); each extra thread adds one set of
        per-quarter buffers.
    """

    n_headings: int = 256
    window_shape: tuple[int, int] = (256, 256)
    bev_shape: tuple[int, int] = (64, 64)
    origin_row: float = 32.0
    origin_col: float = 0.0
    res_m: float = 0.5
    n_modes: int = 8
    mode_radius_cells: int = 6
    mode_radius_headings: int = 8
    coarse_top_k: int = 32
    coarse_climb: int = 16
    coarse_heading_step: int = 2
    track_radius_cells: int = 20
    track_half_headings: int = 15
    track_refine: int = 2
    threads: int = 1

    def __post_init__(self):
        A = self.n_headings
        H, W = self.window_shape
        h, w = self.bev_shape
        if A < 8 or A % 8:
            raise InputError(f"n_headings must be a positive multiple of 8, got {A}")
        if min(H, W, h, w) < 4 or H % 2 or W % 2 or h % 2 or w % 2:
            raise InputError(f"window_shape {self.window_shape} and bev_shape {self.bev_shape} must be even, >= 4")
        if not (self.res_m > 0):
            raise InputError(f"res_m must be > 0, got {self.res_m}")
        if self.track_radius_cells < 1 or self.track_half_headings < 0 or self.track_half_headings * 2 + 1 > A:
            raise InputError("tracking window: radius >= 1 cell and 2 * half_headings + 1 <= n_headings")
        if self.threads not in (1, 2):
            raise InputError(f"threads must be 1 or 2, got {self.threads}")
        if self.coarse_heading_step not in (1, 2):
            raise InputError(f"coarse_heading_step must be 1 or 2, got {self.coarse_heading_step}")
        if min(self.n_modes, self.coarse_top_k, self.coarse_climb, self.track_refine) < 1:
            raise InputError("n_modes, coarse_top_k, coarse_climb and track_refine must be >= 1")

    @property
    def dyaw(self) -> float:
        """Heading step (rad)."""
        return 2.0 * math.pi / self.n_headings


@dataclass
class SearchResult:
    """Result of a full search. Arrays are views of the correlator's workspace, valid until its next call.

    Attributes
    ----------
    best : ndarray (H, W) float32
        Max over heading of the log-likelihood at each window cell (a reduced form of the volume).
    best_heading : ndarray (H, W) int16
        Heading index of that max.
    heading_max : ndarray (A,) float32
        Max over cells of the log-likelihood of each heading (another reduced form).
    heading_argmax : ndarray (A,) int32
        Flat window cell index (i * W + j) of that max.
    modes : list of Mode
        Top modes, best first, refined to sub-cell and sub-heading precision (exact scores).
    volume : ndarray (A, H, W) float32 or None
        The full log-likelihood volume, if the caller passed a buffer for it.
    scale : int
        1 for the full-resolution forms; 2 when ``best`` etc. come from the coarse
        level (fast search): coarse cell (i, j) covers full cells (2i..2i+1, 2j..2j+1).
    heading_scale : int
        Full heading steps per heading index of the reduced forms (coarse heading a is
        full heading ``heading_scale * a``).
    ok : bool
    status : str
    """

    best: np.ndarray
    best_heading: np.ndarray
    heading_max: np.ndarray
    heading_argmax: np.ndarray
    modes: list = field(default_factory=list)
    volume: np.ndarray | None = None
    scale: int = 1
    heading_scale: int = 1
    ok: bool = True
    status: str = "ok"


@dataclass
class TrackResult:
    """Result of a tracking update: the log-likelihood volume over the small window around the prior.

    With ``scale = 1`` (``track(..., exact=True)``) ``volume[t, u, v]`` is the
    log-likelihood of heading index ``(a0 + t) mod A`` at window cell
    ``(row0 + u, col0 + v)``. With ``scale = 2`` (the default, coarse-to-fine)
    ``row0``, ``col0``, ``a0`` and the volume are at the half-resolution level:
    ``volume[t, u, v]`` is heading ``2 (a0 + t) mod A`` with the robot at continuous
    window coordinates ``(2 (row0 + u) + 1, 2 (col0 + v) + 1)``. ``modes`` are always
    exact and at full resolution. Arrays are views of the workspace.
    """

    volume: np.ndarray
    row0: int
    col0: int
    a0: int
    modes: list = field(default_factory=list)
    scale: int = 1
    ok: bool = True
    status: str = "ok"


def _good_size(n: int) -> int:
    """Smallest m >= n whose only prime factors are 2, 3, 5, 7 (fast for pocketfft)."""
    m = n
    while True:
        k = m
        for p in (2, 3, 5, 7):
            while k % p == 0:
                k //= p
        if k == 1:
            return m
        m += 1


def template_bounds(bev_shape, origin_row, origin_col, yaw_rad):
    """Integer bounding box (lo_u, hi_u, lo_v, hi_v) of the map offsets a rotated grid can touch.

    Offsets are (rows south, cols east) from the robot cell; bilinear sampling of an
    (h, w) grid is nonzero only for body points strictly inside the grid grown by half a cell.
    """
    h, w = bev_shape
    xs = (-0.5 - origin_col, w + 0.5 - origin_col)
    ys = (origin_row - h - 0.5, origin_row + 0.5)
    c, s = math.cos(yaw_rad), math.sin(yaw_rad)
    du, dv = [], []
    for xf in xs:
        for yl in ys:
            dv.append(c * xf - s * yl)
            du.append(-(s * xf + c * yl))
    return (math.floor(min(du)), math.ceil(max(du)), math.floor(min(dv)), math.ceil(max(dv)))


def template_reach(bev_shape, origin_row, origin_col) -> int:
    """Largest |offset| (cells, per axis) any rotation of the grid can touch."""
    h, w = bev_shape
    r = max(math.hypot(xf, yl) for xf in (-0.5 - origin_col, w + 0.5 - origin_col)
            for yl in (origin_row - h - 0.5, origin_row + 0.5))
    return int(math.ceil(r))


class _CircleEngine:
    """Exact FFT correlation over all A headings and all cells of an (H, W) window, at one resolution.

    Spectra are stored transposed, (column frequency, row frequency), so that every
    FFT pass and the frequency-domain products run along contiguous memory. The
    transforms run in double precision: numpy's FFT allocates temporaries for
    single-precision arrays but none for double (measured with tracemalloc), and
    the map spectra, the largest buffer, are kept in single precision.
    """

    def __init__(self, F, H, W, bev_shape, origin_row, origin_col, A, threads=1):
        self.F, self.H, self.W, self.A = F, H, W, A
        self.origin = (float(origin_row), float(origin_col))
        self.reach = template_reach(bev_shape, origin_row, origin_col)
        self.N = N = _good_size(max(H, W) + self.reach)
        self.K = Kh = N // 2 + 1
        q = A // 4
        yaws = [2.0 * math.pi * a / A for a in range(q)]
        self.cos = np.cos(yaws)
        self.sin = np.sin(yaws)
        b = np.array([template_bounds(bev_shape, origin_row, origin_col, y) for y in yaws], np.int64)
        self.lo_u, self.lo_v = b[:, 0].copy(), b[:, 2].copy()
        self.SU = int((b[:, 1] - b[:, 0]).max()) + 1
        self.SV = int((b[:, 3] - b[:, 2]).max()) + 1
        L = max(H, W)
        self.G4 = np.zeros((4, F, Kh, N), np.complex64)  # stored single: halves the largest buffer
        self.lanes = [_Lane(F, self.SU, self.SV, Kh, N, L, H, W) for _ in range(threads)]
        self.best, self.best_a = self.lanes[0].best, self.lanes[0].best_a
        self._pool = None
        if threads > 1:
            from concurrent.futures import ThreadPoolExecutor
            # numpy's FFT and the nogil kernels release the GIL, so a second lane runs on the other core.
            self._pool = ThreadPoolExecutor(max_workers=threads - 1, thread_name_prefix="tinyloc-correlate")
        self.head_max = np.zeros(A, np.float32)
        self.head_arg = np.zeros(A, np.int32)
        self._dummy_vol = np.zeros((1, 1, 1), np.float32)
        self.modtab = (np.arange(-N, 2 * N) % N).astype(np.int64)
        # Gathered inverse rows per quarter turn: (first cyclic row, count).
        self.rows = np.zeros((4, q, 2), np.int64)
        for k in range(4):
            length = H if k in (0, 2) else W
            for qi in range(q):
                su = int(self.lo_u[qi])
                start = su if k in (0, 1) else su - length + 1
                self.rows[k, qi] = (start % N, length)

    @property
    def nbytes(self) -> int:
        return sum(ln.nbytes for ln in self.lanes) + self.G4.nbytes + self.head_max.nbytes + self.head_arg.nbytes

    def set_map(self, G):
        """Transform the map features G (F, H, W) float32, for the four quarter turns."""
        N = self.N
        pad = np.zeros((N, N), np.float32)
        idx = (-np.arange(N)) % N
        for f in range(self.F):
            pad[:self.H, :self.W] = G[f]
            # Map turned by k quarters about index 0: G_k(x) = G(rho^-k x), rho(i, j) = (j, -i).
            turned = (pad, pad[idx].T, pad[idx][:, idx], pad[:, idx].T)
            for k in range(4):
                self.G4[k, f] = np.fft.rfft2(np.ascontiguousarray(turned[k])).T

    def run(self, feat, inv_temp, vol):
        write_vol = vol is not None
        v = vol if write_vol else self._dummy_vol
        n = len(self.lanes)
        if n == 1:
            self._run_lane(self.lanes[0], 0, 1, feat, inv_temp, v, write_vol)
            return
        futs = [self._pool.submit(self._run_lane, self.lanes[w], w, n, feat, inv_temp, v, write_vol)
                for w in range(1, n)]
        self._run_lane(self.lanes[0], 0, n, feat, inv_temp, v, write_vol)
        for w, fu in enumerate(futs, start=1):
            fu.result()
            K.merge_best(self.best, self.best_a, self.lanes[w].best, self.lanes[w].best_a)

    def _run_lane(self, ln, first, step, feat, inv_temp, v, write_vol):
        ln.best.fill(-np.inf)
        N, q = self.N, self.A // 4
        orow, ocol = self.origin
        for qi in range(first, q, step):
            K.rotate_into(feat, self.cos[qi], self.sin[qi], orow, ocol, self.lo_u[qi], self.lo_v[qi], ln.canvas_v)
            np.fft.rfft(ln.canvas, axis=2, out=ln.trow)
            K.transpose_rows(ln.trow, ln.Tin)
            np.fft.fft(ln.Tin, axis=2, out=ln.T)
            K.spectra_mac4(self.G4, ln.T, ln.P4)
            su, sv = int(self.lo_u[qi]), int(self.lo_v[qi])
            for k in range(4):
                np.fft.ifft(ln.P4[k], axis=1, out=ln.Q)
                r0, L = self.rows[k, qi]
                K.gather_rows_t(ln.Q, r0, L, N, ln.Qr)
                np.fft.irfft(ln.Qr[:L], n=N, axis=1, out=ln.buf[:L])
                K.readout_tiled(ln.buf, k, su, sv, inv_temp, qi + k * q, ln.best, ln.best_a, self.head_max,
                                self.head_arg, v, write_vol, self.modtab)


class _Lane:
    """The per-thread working buffers of a circle engine (one quarter heading at a time)."""

    def __init__(self, F, SU, SV, Kh, N, L, H, W):
        self.canvas = np.zeros((F, SU, N), np.float64)  # columns >= SV stay 0
        self.canvas_v = self.canvas[:, :, :SV]
        self.trow = np.zeros((F, SU, Kh), np.complex128)
        self.Tin = np.zeros((F, Kh, N), np.complex128)  # entries >= SU (last axis) stay 0
        self.T = np.zeros((F, Kh, N), np.complex128)
        self.P4 = np.zeros((4, Kh, N), np.complex128)
        self.Q = np.zeros((Kh, N), np.complex128)
        self.Qr = np.zeros((L, Kh), np.complex128)
        self.buf = np.zeros((L, N), np.float64)
        self.best = np.zeros((H, W), np.float32)
        self.best_a = np.zeros((H, W), np.int16)

    @property
    def nbytes(self) -> int:
        return sum(a.nbytes for a in (self.canvas, self.trow, self.Tin, self.T, self.P4, self.Q, self.Qr, self.buf,
                                      self.best, self.best_a))


class _PatchEngine:
    """Exact FFT correlation over a few headings and an (Ho, Ho) block of cells.

    The map patch of a call covers only the union of the offset boxes of that call's
    headings (``template_bounds``) around the (Ho, Ho) block, not the full reach of
    every rotation; the FFT size is fixed at construction as the largest such patch
    over every run of ``n_head`` consecutive headings of the circle (150 instead of
    189 at the defaults: the forward transforms, most of the cost, shrink by about
    0.6). Nothing wraps: every read of a patch index stays below the patch size.

    Headings can be transformed in batches of ``batch`` (fewer, larger FFT calls); measured
    slower than one at a time at the tracking sizes (the larger working set leaves the cache),
    so the correlator uses 1.
    """

    def __init__(self, F, Ho, n_head, bev_shape, origin_row, origin_col, A, batch=1):
        self.F, self.Ho, self.n_head, self.A = F, Ho, n_head, A
        self.origin = (float(origin_row), float(origin_col))
        self.bev_shape = bev_shape
        self.reach = template_reach(bev_shape, origin_row, origin_col)
        b = np.array([template_bounds(bev_shape, origin_row, origin_col, 2.0 * math.pi * a / A)
                      for a in range(A)], np.int64)
        self.bounds = b  # (A, 4): lo_u, hi_u, lo_v, hi_v per heading
        self.cos = np.cos(2.0 * math.pi * np.arange(A) / A)
        self.sin = np.sin(2.0 * math.pi * np.arange(A) / A)
        # Largest union box over any n_head consecutive headings: the patch of any call fits in it.
        UU = UV = 0
        for a0 in range(A):
            idx = (a0 + np.arange(n_head)) % A
            UU = max(UU, int(b[idx, 1].max() - b[idx, 0].min()) + 1)
            UV = max(UV, int(b[idx, 3].max() - b[idx, 2].min()) + 1)
        SU = int((b[:, 1] - b[:, 0]).max()) + 1
        SV = int((b[:, 3] - b[:, 2]).max()) + 1
        self.Mr, self.Mc = Ho + UU - 1, Ho + UV - 1
        self.Nr = _good_size(self.Mr)
        self.Nc = _good_size(self.Mc)
        self.N = max(self.Nr, self.Nc)
        Nr, Nc = self.Nr, self.Nc
        Kh = Nc // 2 + 1
        self.SU, self.SV = SU, SV
        self.B = B = max(1, min(batch, n_head))
        self.canvas = np.zeros((B, F, SU, Nc), np.float64)  # columns >= SV stay 0
        self._canvas_v = [self.canvas[b_, :, :, :SV] for b_ in range(B)]
        self.trow = np.zeros((B, F, SU, Kh), np.complex128)
        self.Tin = np.zeros((B, F, Kh, Nr), np.complex128)  # entries >= SU (last axis) stay 0
        self.T = np.zeros((B, F, Kh, Nr), np.complex128)
        self.patch = np.zeros((F, Nr, Nc), np.float64)
        self.grow = np.zeros((F, Nr, Kh), np.complex128)
        self.Gin = np.zeros((F, Kh, Nr), np.complex128)
        self.Gs = np.zeros((F, Kh, Nr), np.complex128)
        self.P = np.zeros((B, Kh, Nr), np.complex128)
        self.Q = np.zeros((B, Kh, Nr), np.complex128)
        self.Qr = np.zeros((B, Ho, Kh), np.complex128)
        self.buf = np.zeros((B, Ho, Nc), np.float64)
        self.vol = np.zeros((n_head, Ho, Ho), np.float32)
        self._shift = np.zeros((B, 2), np.int64)

    @property
    def nbytes(self) -> int:
        return sum(a.nbytes for a in (self.canvas, self.trow, self.Tin, self.T, self.patch, self.grow, self.Gin,
                                      self.Gs, self.P, self.Q, self.Qr, self.buf, self.vol))

    def run(self, feat, G, row0, col0, a0, A, inv_temp):
        """Fill self.vol for headings a0..a0+n_head-1 and cells (row0 + u, col0 + v) of the window G."""
        F, Ho, Nr, Nc, B = self.F, self.Ho, self.Nr, self.Nc, self.B
        H, W = G.shape[1], G.shape[2]
        bd = self.bounds
        LU, LV = 1 << 30, 1 << 30
        HU, HV = -(1 << 30), -(1 << 30)
        for t in range(self.n_head):
            a = (a0 + t) % A
            LU, HU = min(LU, int(bd[a, 0])), max(HU, int(bd[a, 1]))
            LV, HV = min(LV, int(bd[a, 2])), max(HV, int(bd[a, 3]))
        self.patch.fill(0.0)
        # Patch cell (r, c) = window cell (row0 + LU + r, col0 + LV + c); outside the window stays 0.
        r_lo, c_lo = row0 + LU, col0 + LV
        wr0, wr1 = max(0, r_lo), min(H, row0 + Ho + HU)
        wc0, wc1 = max(0, c_lo), min(W, col0 + Ho + HV)
        if wr1 > wr0 and wc1 > wc0:
            self.patch[:, wr0 - r_lo:wr1 - r_lo, wc0 - c_lo:wc1 - c_lo] = G[:, wr0:wr1, wc0:wc1]
        np.fft.rfft(self.patch, axis=2, out=self.grow)
        K.transpose_rows(self.grow, self.Gin)
        np.fft.fft(self.Gin, axis=2, out=self.Gs)
        orow, ocol = self.origin
        for t0 in range(0, self.n_head, B):
            nb = min(B, self.n_head - t0)
            for b in range(nb):
                a = (a0 + t0 + b) % A
                lu, lv = int(bd[a, 0]), int(bd[a, 2])
                K.rotate_into(feat, self.cos[a], self.sin[a], orow, ocol, lu, lv, self._canvas_v[b])
                # Output cell u, canvas row t read patch index u + (lu - LU) + t (<= Ho - 1 + HU - LU).
                self._shift[b, 0], self._shift[b, 1] = lu - LU, lv - LV
            np.fft.rfft(self.canvas[:nb], axis=3, out=self.trow[:nb])
            K.transpose_rows(self.trow[:nb].reshape(nb * F, self.SU, -1), self.Tin[:nb].reshape(nb * F, -1, Nr))
            np.fft.fft(self.Tin[:nb], axis=3, out=self.T[:nb])
            for b in range(nb):
                K.spectra_mac1(self.Gs, self.T[b], self.P[b])
            np.fft.ifft(self.P[:nb], axis=2, out=self.Q[:nb])
            for b in range(nb):
                K.gather_rows_t(self.Q[b], self._shift[b, 0], Ho, Nr, self.Qr[b])
            np.fft.irfft(self.Qr[:nb], n=Nc, axis=2, out=self.buf[:nb])
            for b in range(nb):
                K.readout_patch(self.buf[b], 0, self._shift[b, 1], inv_temp, self.vol[t0 + b])


class Correlator:
    """Scores a bird's-eye grid against a map window over headings and shifts, in preallocated memory.

    Parameters
    ----------
    params : CorrelatorParams
    model : ScoringModel, optional
        Defaults to the shipped, calibrated model.

    Notes
    -----
    All working buffers are allocated here; ``search``, ``search_fast`` and
    ``track`` allocate no arrays (measured in the tests with tracemalloc). Results
    are views of the workspace and are overwritten by the next call.
    """

    def __init__(self, params: CorrelatorParams | None = None, model: ScoringModel | None = None):
        self.params = p = params or CorrelatorParams()
        self.model = model or ScoringModel.default()
        F = self.model.n_features
        H, W = p.window_shape
        h, w = p.bev_shape
        self._wb = np.ascontiguousarray(self.model.bev_weights, np.float32)
        self._feat = np.zeros((F, h, w), np.float32)
        self._feat_c = np.zeros((F, h // 2, w // 2), np.float32)
        self._G = np.zeros((F, H, W), np.float32)
        self._G_hwf = np.zeros((H, W, F), np.float32)  # the same, cell-major, for the direct sums
        self._Gc = np.zeros((F, H // 2, W // 2), np.float32)
        self._scratch = np.zeros((H, W), np.float32)
        self._inv_temp = 1.0 / self.model.temperature
        self._fine = self._coarse = self._track = self._track_c = None  # allocated at first use (or warm_up)
        self._refiner = _Refiner(F, p)
        self._pw_fine = PeakWork(p.window_shape)
        self._pw_coarse = PeakWork((H // 2, W // 2))
        self._pw_track = PeakWork((2 * p.track_half_headings + 1,) + (2 * p.track_radius_cells + 1,) * 2)
        self._pw_track_c = PeakWork((2 * ((p.track_half_headings + 1) // 2) + 1,)
                                    + (2 * ((p.track_radius_cells + 1) // 2) + 1,) * 2)
        self._have_map = False

    def _fine_engine(self) -> "_CircleEngine":
        if self._fine is None:
            p = self.params
            self._fine = _CircleEngine(self.model.n_features, *p.window_shape, p.bev_shape, p.origin_row,
                                       p.origin_col, p.n_headings, p.threads)
            if self._have_map:
                self._fine.set_map(self._G)
        return self._fine

    def _coarse_engine(self) -> "_CircleEngine":
        if self._coarse is None:
            p = self.params
            H, W = p.window_shape
            h, w = p.bev_shape
            self._coarse = _CircleEngine(self.model.n_features, H // 2, W // 2, (h // 2, w // 2), p.origin_row / 2,
                                         p.origin_col / 2, p.n_headings // p.coarse_heading_step, p.threads)
            if self._have_map:
                self._coarse.set_map(self._Gc)
        return self._coarse

    def _track_engine(self) -> "_PatchEngine":
        if self._track is None:
            p = self.params
            self._track = _PatchEngine(self.model.n_features, 2 * p.track_radius_cells + 1,
                                       2 * p.track_half_headings + 1, p.bev_shape, p.origin_row, p.origin_col,
                                       p.n_headings)
        return self._track

    def _track_engine_coarse(self) -> "_PatchEngine":
        if self._track_c is None:
            p = self.params
            h, w = p.bev_shape
            self._track_c = _PatchEngine(self.model.n_features, 2 * ((p.track_radius_cells + 1) // 2) + 1,
                                         2 * ((p.track_half_headings + 1) // 2) + 1, (h // 2, w // 2),
                                         p.origin_row / 2, p.origin_col / 2, p.n_headings // 2)
        return self._track_c

    # -- set-up ----------------------------------------------------------------------------
    @property
    def workspace_bytes(self) -> int:
        """Bytes of the working buffers allocated so far (engines are allocated at first use)."""
        return sum(self.workspace_report().values())

    def workspace_report(self) -> dict:
        """Bytes per part of the workspace: shared buffers, and each engine allocated so far."""
        shared = sum(a.nbytes for a in (self._feat, self._feat_c, self._G, self._G_hwf, self._Gc, self._scratch))
        shared += self._pw_fine.nbytes + self._pw_coarse.nbytes + self._pw_track.nbytes + self._pw_track_c.nbytes
        shared += self._refiner.nbytes
        out = {"shared": shared}
        for name, e in (("exact", self._fine), ("coarse", self._coarse), ("track_exact", self._track),
                        ("track", self._track_c)):
            if e is not None:
                out[name] = e.nbytes
        return out

    def set_map(self, window: np.ndarray) -> None:
        """Take a map window (C, H, W) float32 (``MAP_CLASSES`` order, row 0 north); once per window.

        This precomputes the map spectra; it may allocate (it is not on the per-frame path).
        """
        p = self.params
        window = np.asarray(window)
        if window.ndim != 3 or window.shape[0] != NUM_MAP_CLASSES or tuple(window.shape[1:]) != p.window_shape:
            raise InputError(f"map window: expected shape ({NUM_MAP_CLASSES}, {p.window_shape[0]}, "
                             f"{p.window_shape[1]}), got {window.shape}")
        window = np.ascontiguousarray(window, np.float32)
        if not np.all(np.isfinite(window)):
            raise InputError("map window: values must be finite")
        self.model.map_features(window, out=self._G, scratch=self._scratch)
        K.downsample2(self._G, self._Gc)
        self._G_hwf[...] = self._G.transpose(1, 2, 0)
        if self._fine is not None:
            self._fine.set_map(self._G)
        if self._coarse is not None:
            self._coarse.set_map(self._Gc)
        self._have_map = True

    def warm_up(self, modes=("fast", "track")) -> None:
        """Allocate the engines of the given modes ("exact", "fast", "track", "track_exact") and compile (or load from
        the on-disk cache) their kernels, so the first frame is neither slow nor allocating."""
        p = self.params
        from .synth import SyntheticBev
        z = np.zeros((NUM_MAP_CLASSES,) + p.bev_shape, np.float32)
        bev = SyntheticBev(z, z[0], z[0], p.res_m, p.origin_row, p.origin_col)
        had = self._have_map
        if not had:
            self.set_map(np.zeros((NUM_MAP_CLASSES,) + p.window_shape, np.float32))
        if "exact" in modes:
            self.search(bev)
        if "fast" in modes:
            self.search_fast(bev)
        if "track" in modes:
            self.track(bev, p.window_shape[0] // 2, p.window_shape[1] // 2, 0)
        if "track_exact" in modes:
            self.track(bev, p.window_shape[0] // 2, p.window_shape[1] // 2, 0, exact=True)
        self._have_map = had

    # -- per frame -------------------------------------------------------------------------
    def _prepare(self, bev) -> str:
        p = self.params
        if not self._have_map:
            return "no map window set"
        if getattr(bev, "status", "ok") != "ok":
            return f"bird's-eye grid unusable: {bev.status}"
        ev, fr, vi = bev.evidence, bev.free, bev.visible
        if (ev.shape != (NUM_MAP_CLASSES,) + p.bev_shape or fr.shape != p.bev_shape or vi.shape != p.bev_shape
                or ev.dtype != np.float32 or fr.dtype != np.float32 or vi.dtype != np.float32):
            return f"bird's-eye grid: expected float32 ({NUM_MAP_CLASSES}, {p.bev_shape[0]}, {p.bev_shape[1]})"
        if abs(bev.res_m - p.res_m) > 1e-9 or bev.origin_row != p.origin_row or bev.origin_col != p.origin_col:
            return "bird's-eye grid: resolution or origin differs from the correlator's"
        K.bev_features(ev, fr, vi, self._wb, self._feat)
        return "ok"

    def search(self, bev, *, volume: np.ndarray | None = None) -> SearchResult:
        """Exact full search: all headings x all window cells at full resolution.

        Parameters
        ----------
        bev : BevGrid
            Bird's-eye evidence (docs/interfaces.md layout).
        volume : ndarray (A, H, W) float32, optional
            Caller-owned buffer for the full log-likelihood volume (64 MB at the
            defaults); without it only the reduced forms are kept.
        """
        p, e = self.params, self._fine_engine()
        status = self._prepare(bev)
        if status != "ok":
            return SearchResult(e.best, e.best_a, e.head_max, e.head_arg, ok=False, status=status)
        if volume is not None and (volume.shape != (p.n_headings,) + p.window_shape or volume.dtype != np.float32
                                   or not volume.flags.c_contiguous):
            raise InputError(f"volume buffer: expected C-contiguous float32 {(p.n_headings,) + p.window_shape}")
        e.run(self._feat, self._inv_temp, volume)
        self._refiner.reset()
        modes = find_modes(e.best, e.best_a, self._pw_fine, 1, p.n_modes, p.mode_radius_cells,
                           p.mode_radius_headings, p.n_headings)
        modes = [self._refiner.refine(self._feat, self._G_hwf, m, self._inv_temp, hill_climb=False) for m in modes]
        modes.sort(key=lambda m: -m.cell_loglik)
        return SearchResult(e.best, e.best_a, e.head_max, e.head_arg, modes=modes, volume=volume)

    def search_fast(self, bev) -> SearchResult:
        """Coarse-to-fine full search.

        The exact search runs at half resolution (1 m cells, A/2 headings); its
        ``coarse_top_k`` best non-suppressed hypotheses are then climbed to their
        local best at full resolution with exact scores, and refined below a cell
        and a heading step. Reduced forms are those of the coarse level (``scale = 2``).
        """
        p, e = self.params, self._coarse_engine()
        status = self._prepare(bev)
        if status != "ok":
            return SearchResult(e.best, e.best_a, e.head_max, e.head_arg, scale=2,
                                heading_scale=p.coarse_heading_step, ok=False, status=status)
        K.downsample2(self._feat, self._feat_c)
        # x4: a 2x2 block-mean score sums 4x fewer cells; this puts it on the full-resolution scale.
        e.run(self._feat_c, 4.0 * self._inv_temp, None)
        self._refiner.reset()
        cands = find_modes(e.best, e.best_a, self._pw_coarse, 2, p.coarse_top_k, max(1, p.mode_radius_cells // 2),
                           max(1, p.mode_radius_headings // p.coarse_heading_step),
                           p.n_headings // p.coarse_heading_step)
        starts = [coarse_start(self._refiner, self._feat, self._G_hwf, m, self._inv_temp, p, p.coarse_heading_step)
                  for m in cands]
        starts.sort(key=lambda m: -m.cell_loglik)
        fine = [self._refiner.refine(self._feat, self._G_hwf, m, self._inv_temp, hill_climb=True)
                for m in starts[:p.coarse_climb]]
        modes = _distinct(fine, p, p.n_modes)
        return SearchResult(e.best, e.best_a, e.head_max, e.head_arg, modes=modes, scale=2,
                            heading_scale=p.coarse_heading_step)

    def track(self, bev, row: float, col: float, heading_index: int, *, exact: bool = False) -> TrackResult:
        """Tracking update around a prior: +-track_radius_cells and +-track_half_headings.

        Parameters
        ----------
        bev : BevGrid
        row, col : float
            Prior window cell of the robot (cell indices; the robot at the cell centre).
        heading_index : int
            Prior heading index.
        exact : bool
            False (default): coarse-to-fine - the window is scored exactly at half
            resolution (1 m, 2 heading steps), and the ``track_refine`` best modes are
            climbed to their local best at full resolution with exact scores.
            True: the exact full-resolution volume over the window (slower).
        """
        p = self.params
        R, hh = p.track_radius_cells, p.track_half_headings
        if exact:
            e = self._track_engine()
            row0, col0 = int(round(row)) - R, int(round(col)) - R
            a0 = (int(heading_index) - hh) % p.n_headings
        else:
            e = self._track_engine_coarse()
            Rc, hc = (R + 1) // 2, (hh + 1) // 2
            row0, col0 = int(round(row)) // 2 - Rc, int(round(col)) // 2 - Rc
            a0 = (int(round(heading_index / 2.0)) - hc) % (p.n_headings // 2)
        status = self._prepare(bev)
        if status != "ok":
            return TrackResult(e.vol, row0, col0, a0, scale=1 if exact else 2, ok=False, status=status)
        self._refiner.reset()
        if exact:
            e.run(self._feat, self._G, row0, col0, a0, p.n_headings, self._inv_temp)
            modes = modes_of_volume(e.vol, row0, col0, a0, p.n_headings, self._pw_track, p.n_modes,
                                    p.mode_radius_cells, p.mode_radius_headings)
            return TrackResult(e.vol, row0, col0, a0, modes=modes)
        K.downsample2(self._feat, self._feat_c)
        e.run(self._feat_c, self._Gc, row0, col0, a0, p.n_headings // 2, 4.0 * self._inv_temp)
        cands = modes_of_volume(e.vol, row0, col0, a0, p.n_headings // 2, self._pw_track_c, p.track_refine,
                                max(1, p.mode_radius_cells // 2), max(1, p.mode_radius_headings // 2))
        starts = [coarse_start(self._refiner, self._feat, self._G_hwf, m, self._inv_temp, p) for m in cands]
        modes = _distinct([self._refiner.refine(self._feat, self._G_hwf, m, self._inv_temp, hill_climb=True)
                           for m in starts], p, p.n_modes)
        return TrackResult(e.vol, row0, col0, a0, modes=modes, scale=2)

    def pose_of(self, mode: Mode) -> tuple[float, float, float]:
        """(row, col, yaw_rad) of a mode: continuous window cell of the robot origin and its yaw."""
        return mode.row + 0.5, mode.col + 0.5, float(wrap_angle(mode.heading * self.params.dyaw))


def _distinct(modes, p, n):
    """Best first, dropping modes within the suppression radius of a better one (climbs can converge)."""
    out = []
    for m in sorted(modes, key=lambda m: -m.cell_loglik):
        if all(not _near(m, o, p) for o in out):
            out.append(m)
        if len(out) == n:
            break
    return out


def _near(m, o, p) -> bool:
    dh = abs((m.heading - o.heading + p.n_headings / 2) % p.n_headings - p.n_headings / 2)
    return abs(m.row - o.row) <= p.mode_radius_cells and abs(m.col - o.col) <= p.mode_radius_cells \
        and dh <= p.mode_radius_headings


class _Refiner:
    """Exact scores at chosen poses by direct sums over a heading's rotated grid.

    The rotated grid of each heading asked for is computed once per frame and kept
    compacted (only cells with nonzero evidence: the camera's visible wedge), in a
    small round-robin cache of slots.
    """

    SLOTS = 48

    def __init__(self, F, p: CorrelatorParams):
        self.p = p
        SU = SV = 0
        for a in range(64):
            lu, hu, lv, hv = template_bounds(p.bev_shape, p.origin_row, p.origin_col, 2 * math.pi * a / 64)
            SU, SV = max(SU, hu - lu + 2), max(SV, hv - lv + 2)
        self.feat_hwf = np.zeros(tuple(p.bev_shape) + (F,), np.float32)
        self._feat_frame = None
        self.uv = np.zeros((self.SLOTS, SU * SV, 2), np.int16)  # offsets are within +-reach
        self.vals = np.zeros((self.SLOTS, SU * SV, F), np.float32)
        self.count = np.zeros(self.SLOTS, np.int64)
        self.slot_heading = np.full(self.SLOTS, -1, np.int64)
        self.next_slot = 0
        self.rows = np.zeros(64, np.int64)
        self.cols = np.zeros(64, np.int64)
        self.out = np.zeros(64, np.float64)

    @property
    def nbytes(self) -> int:
        return sum(a.nbytes for a in (self.feat_hwf, self.uv, self.vals, self.count, self.rows, self.cols, self.out))

    def _slot(self, feat, a):
        p = self.p
        a %= p.n_headings
        for s in range(self.SLOTS):
            if self.slot_heading[s] == a:
                return s
        s = self.next_slot
        self.next_slot = (s + 1) % self.SLOTS
        yaw = 2.0 * math.pi * a / p.n_headings
        lu, hu, lv, hv = template_bounds(p.bev_shape, p.origin_row, p.origin_col, yaw)
        if self._feat_frame is not feat:
            self.feat_hwf[...] = feat.transpose(1, 2, 0)  # once per frame: taps of all features adjacent
            self._feat_frame = feat
        # Only this heading's own bounding box (up to half the cells of the largest one).
        self.count[s] = K.rotate_compact(self.feat_hwf, math.cos(yaw), math.sin(yaw), p.origin_row, p.origin_col,
                                         lu, lv, hu - lu + 1, hv - lv + 1, self.uv[s], self.vals[s])
        self.slot_heading[s] = a
        return s

    def reset(self):
        """Forget the cached grids (a new frame)."""
        self.slot_heading.fill(-1)
        self._feat_frame = None

    def scores(self, feat, G, a, cells, inv_temp):
        """Exact tempered log-likelihoods of heading a at the given (row, col) window cells."""
        s = self._slot(feat, a)
        n = min(len(cells), self.rows.shape[0])
        for k in range(n):
            self.rows[k], self.cols[k] = cells[k]
        K.sparse_scores(self.uv[s], self.vals[s], self.count[s], G, self.rows[:n], self.cols[:n], self.out[:n])
        return [float(self.out[k]) * inv_temp for k in range(n)]

    def refine(self, feat, G, m: Mode, inv_temp, *, hill_climb: bool, heading_scale: int = 2) -> Mode:
        return refine_mode(self, feat, G, m, inv_temp, self.p, hill_climb=hill_climb, heading_scale=heading_scale)
