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

The exact search transforms in double precision (numpy); the coarse level of the
fast search and the tracking engines in single precision with OpenCV's ``cv2.dft``
(``CorrelatorParams.fft``), spectra in OpenCV's packed layout. Both full searches
end with the same ranking and tie rule (``plateau_budget``): highest exact score,
ties to the lowest flat index over the near-best plateau.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..classes import NUM_MAP_CLASSES
from ..errors import InputError
from ..frames import wrap_angle
from . import _kernels as K
from .peaks import Mode, PeakWork, parabola, find_modes, modes_of_volume
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
    coarse_budget_cells : int
        Refinement budget of the fast search in grid cells (0: off, a fixed ``coarse_top_k`` / ``coarse_climb``).
        An exact score at one pose costs about one multiply-add per feature per grid cell with evidence, so a
        frame with fewer such cells than this gets proportionally more hypotheses and climbs, up to
        ``coarse_budget_max`` times as many: the same work, spent where the coarse level is least reliable.
    coarse_budget_max : int
        Largest factor on ``coarse_top_k`` and ``coarse_climb`` of the budget (1 .. 16).
    plateau_budget : int
        The tie rule of both full searches (0: off): after its climbs, each search walks the near-best plateau
        of its best modes (poses whose exact score is within ``plateau_tol`` of the peak, 3 x 3 x 3
        neighbourhoods, at most this many poses scored per mode) and keeps the highest exact score met; among
        exactly equal scores, the lowest flat index (heading, row, col). Two searches that land on the same
        plateau (a straight street) then end on the same pose.
    plateau_tol : float
        Width of that plateau as a fraction of the peak's |log-likelihood| (1e-4: the exactness bound of the
        exact search, within which its own FFT values cannot rank poses).
    coarse_heading_step : int
        Heading step of the coarse full search, in full steps (1, 2, 4 or 8), or 0 (default):
        4 when n_headings is a multiple of 16, else 2 (see ``coarse_step``). 8 (with ``coarse_top_k`` 48 and
        ``coarse_climb`` 24) matched the default's agreement with the exact search in 0.8 of the time over 400
        planted-pose trials but lowered the loop's recall on one tuning drive (docs/correlator.md). The coarse level
        needs n_headings / step to be a multiple of 4 (its exact quarter turns).
    track_radius_cells : int
        Half size of the tracking window (cells); 20 = +-10 m at 0.5 m.
    track_half_headings : int
        Headings each side of the prior in tracking; 15 = +-21 deg at A = 256.
    track_refine : int
        Modes of the coarse tracking volume refined at full resolution.
    threads : int
        Threads of the full searches (1 or 2); each extra thread adds one set of
        per-quarter buffers.
    climb_heading_radius : int
        Headings each side of the current pose that a climb step of the exact
        refinement looks at once the 3 x 3 x 3 neighbourhood is a local maximum.
    start_heading_reach : int
        Full headings each side of a coarse hypothesis's own that are scored under it to
        rank the climbs' starts (0: its own heading only; the climbs look further).
    track_engine : str
        "support" (default): the tracking engines transform only the features this frame has and
        only the offsets its nonzero cells can reach, with FFT sizes chosen per call; "fixed": the
        earlier engine, whole grid and every feature at sizes fixed at construction (kept as the
        benchmark's same-run reference). Both give the same volume.
    track_threads : int
        Threads of the tracking update (1 or 2; headings alternate between two buffer lanes).
    fft : str
        Transforms of the coarse full-search level and of the tracking engines: "numpy" (double precision,
        pocketfft) or "opencv" (single precision, ``cv2.dft``, 2-3x faster at these sizes, measured). The exact
        full search (``search``) always runs in double precision: it is the reference the others are checked
        against.
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
    coarse_budget_cells: int = 1024
    coarse_budget_max: int = 16
    plateau_budget: int = 2000
    budget_climb_heading_radius: int = 3
    plateau_tol: float = 1e-4
    coarse_heading_step: int = 0
    track_radius_cells: int = 20
    track_half_headings: int = 15
    track_refine: int = 2
    threads: int = 1
    climb_heading_radius: int = 2
    start_heading_reach: int = 0
    track_engine: str = "support"
    track_threads: int = 1
    fft: str = "opencv"

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
        if self.track_threads not in (1, 2):
            raise InputError(f"track_threads must be 1 or 2, got {self.track_threads}")
        if self.fft not in ("numpy", "opencv"):
            raise InputError(f"fft must be 'numpy' or 'opencv', got {self.fft!r}")
        if self.track_engine not in ("support", "fixed"):
            raise InputError(f"track_engine must be 'support' or 'fixed', got {self.track_engine!r}")
        if self.coarse_heading_step not in (0, 1, 2, 4, 8):
            raise InputError(f"coarse_heading_step must be 0 (automatic), 1, 2, 4 or 8, got "
                             f"{self.coarse_heading_step}")
        if (A // self.coarse_step) % 4:
            raise InputError(f"n_headings / coarse_heading_step must be a multiple of 4, got {A} / "
                             f"{self.coarse_heading_step}")
        if not 0 <= self.start_heading_reach <= 4:
            raise InputError(f"start_heading_reach must be 0..4, got {self.start_heading_reach}")
        if self.climb_heading_radius not in (1, 2, 3):
            raise InputError(f"climb_heading_radius must be 1, 2 or 3, got {self.climb_heading_radius}")
        if self.plateau_budget < 0 or not 0.0 <= self.plateau_tol <= 0.01:
            raise InputError(f"plateau_budget must be >= 0 and plateau_tol 0..0.01, got {self.plateau_budget} and "
                             f"{self.plateau_tol}")
        if self.coarse_budget_cells < 0 or not 1 <= self.coarse_budget_max <= 16:
            raise InputError(f"coarse_budget_cells must be >= 0 and coarse_budget_max 1..16, got "
                             f"{self.coarse_budget_cells} and {self.coarse_budget_max}")
        if min(self.n_modes, self.coarse_top_k, self.coarse_climb, self.track_refine) < 1:
            raise InputError("n_modes, coarse_top_k, coarse_climb and track_refine must be >= 1")

    @property
    def coarse_step(self) -> int:
        """Heading step of the coarse full search in use (``coarse_heading_step``, or automatic when 0)."""
        if self.coarse_heading_step:
            return self.coarse_heading_step
        return 4 if self.n_headings % 16 == 0 else 2

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
        Heading index of that max, in steps of ``heading_scale`` full headings.
    heading_max : ndarray (A / heading_max_scale,) float32
        Max over cells of the log-likelihood of each heading searched (another reduced form).
    heading_argmax : ndarray (A / heading_max_scale,) int32
        Flat window cell index (i * W + j) of that max.
    modes : list of Mode
        Top modes, best first, refined to sub-cell and sub-heading precision (exact scores).
    volume : ndarray (A, H, W) float32 or None
        The full log-likelihood volume, if the caller passed a buffer for it.
    scale : int
        1 for the full-resolution forms; 2 when ``best`` etc. come from the coarse
        level (fast search): coarse cell (i, j) covers full cells (2i..2i+1, 2j..2j+1).
    heading_scale : int
        Full heading steps per unit of ``best_heading`` (``best_heading`` a is full heading
        ``heading_scale * a``): 1 for ``search``, 2 for ``search_fast``.
    heading_max_scale : int
        Full heading steps per entry of ``heading_max`` / ``heading_argmax`` (entry t is full
        heading ``heading_max_scale * t``): 1 for ``search``, ``params.coarse_step`` for
        ``search_fast``.
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
    heading_max_scale: int = 1
    ok: bool = True
    status: str = "ok"


class TrackResult:
    """Result of a tracking update: the log-likelihood volume over the small window around the prior.

    With ``scale = 1`` (``track(..., exact=True)``) ``volume[t, u, v]`` is the
    log-likelihood of heading index ``(a0 + t) mod A`` at window cell
    ``(row0 + u, col0 + v)``. With ``scale = 2`` (the default, coarse-to-fine)
    ``row0``, ``col0``, ``a0`` and the volume are at the half-resolution level:
    ``volume[t, u, v]`` is heading ``2 (a0 + t) mod A`` with the robot at continuous
    window coordinates ``(2 (row0 + u) + 1, 2 (col0 + v) + 1)``. ``modes`` are always
    exact and at full resolution. Arrays are views of the workspace.

    ``modes`` are worked out when first read (a filter that takes only the volume does not
    pay for their exact refinement); like the volume they come from the workspace, so read
    them before the correlator's next call (a later read raises ``InputError``).
    """

    __slots__ = ("volume", "row0", "col0", "a0", "scale", "ok", "status", "_modes", "_make", "_owner", "_call")

    def __init__(self, volume, row0, col0, a0, modes=None, scale=1, ok=True, status="ok", *, _make=None,
                 _owner=None):
        self.volume, self.row0, self.col0, self.a0 = volume, row0, col0, a0
        self.scale, self.ok, self.status = scale, ok, status
        self._modes = None if modes is None and _make is not None else list(modes or [])
        self._make, self._owner = _make, _owner
        self._call = _owner._calls if _owner is not None else 0

    @property
    def modes(self) -> list:
        """Top modes, best first (exact scores, full resolution)."""
        if self._modes is None:
            if self._owner._calls != self._call:
                raise InputError("TrackResult.modes read after a later correlator call: read it before the next "
                                 "call (results are views of the correlator's workspace)")
            self._modes = self._make()
            self._make = None
        return self._modes

    def __repr__(self) -> str:
        return (f"TrackResult(volume={self.volume.shape}, row0={self.row0}, col0={self.col0}, a0={self.a0}, "
                f"scale={self.scale}, ok={self.ok}, status={self.status!r})")


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


def _fast_size(n: int) -> int:
    """Smallest m >= n whose only prime factors are 2, 3, 5: pocketfft's radix-7 passes were measured slower per
    point at the tracking sizes (98, 112, 126, 140 against 96, 108, 120, 144)."""
    m = max(1, n)
    while True:
        k = m
        for p in (2, 3, 5):
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


def _heading_boxes(bev_shape, origin_row, origin_col, A: int, n_head: int):
    """Offset boxes of the rotated grid per heading and the sizes every tracking patch fits in.

    Returns ``(bounds, UU, UV, SU, SV)``: ``bounds`` (A, 4) int64 rows lo_u, hi_u, lo_v, hi_v
    (``template_bounds``) per heading; UU, UV the largest union box (rows, columns) over any
    ``n_head`` consecutive headings of the circle (the patch of any call fits in it); SU, SV the
    largest single-heading box.
    """
    b = np.array([template_bounds(bev_shape, origin_row, origin_col, 2.0 * math.pi * a / A)
                  for a in range(A)], np.int64)
    UU = UV = 0
    for a0 in range(A):
        idx = (a0 + np.arange(n_head)) % A
        UU = max(UU, int(b[idx, 1].max() - b[idx, 0].min()) + 1)
        UV = max(UV, int(b[idx, 3].max() - b[idx, 2].min()) + 1)
    return b, UU, UV, int((b[:, 1] - b[:, 0]).max()) + 1, int((b[:, 3] - b[:, 2]).max()) + 1


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
        N = self._geometry(F, H, W, bev_shape, origin_row, origin_col, A, _good_size)
        self.K = Kh = N // 2 + 1
        self.G4 = np.zeros((4, F, Kh, N), np.complex64)  # stored single: halves the largest buffer
        self.lanes = [_Lane(F, self.SU, self.SV, Kh, N, max(H, W), H, W) for _ in range(threads)]
        self._buffers(threads)

    def _geometry(self, F, H, W, bev_shape, origin_row, origin_col, A, size) -> int:
        """Sizes and the quarter-turn templates' bounds shared by both transform providers; returns N."""
        self.F, self.H, self.W, self.A = F, H, W, A
        self.origin = (float(origin_row), float(origin_col))
        self.reach = template_reach(bev_shape, origin_row, origin_col)
        self.N = N = size(max(H, W) + self.reach)
        yaws = [2.0 * math.pi * a / A for a in range(A // 4)]
        self.cos = np.cos(yaws)
        self.sin = np.sin(yaws)
        b = np.array([template_bounds(bev_shape, origin_row, origin_col, y) for y in yaws], np.int64)
        self.lo_u, self.lo_v = b[:, 0].copy(), b[:, 2].copy()
        self.SU = int((b[:, 1] - b[:, 0]).max()) + 1
        self.SV = int((b[:, 3] - b[:, 2]).max()) + 1
        return N

    def _buffers(self, threads) -> None:
        """Read-out buffers, the second lane's thread and the gathered inverse rows (after ``lanes``)."""
        A, N, H, W, q = self.A, self.N, self.H, self.W, self.A // 4
        self.best, self.best_a = self.lanes[0].best, self.lanes[0].best_a
        self.native = True  # reduced forms through per-quarter maxima (readout_native) when no volume is asked
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

    def _quarter_turns(self, G):
        """Each map feature of G (F, H, W), zero-padded to (N, N) and turned by k quarters: yields (f, k, array)."""
        N = self.N
        pad = np.zeros((N, N), np.float32)
        idx = (-np.arange(N)) % N
        for f in range(self.F):
            pad[:self.H, :self.W] = G[f]
            # Map turned by k quarters about index 0: G_k(x) = G(rho^-k x), rho(i, j) = (j, -i).
            turned = (pad, pad[idx].T, pad[idx][:, idx], pad[:, idx].T)
            for k in range(4):
                yield f, k, np.ascontiguousarray(turned[k])

    def set_map(self, G):
        """Transform the map features G (F, H, W) float32, for the four quarter turns."""
        for f, k, g in self._quarter_turns(G):
            self.G4[k, f] = np.fft.rfft2(g).T

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
        ln.nat.fill(-np.inf)
        N, q = self.N, self.A // 4
        H, W = self.H, self.W
        orow, ocol = self.origin
        native = self.native and not write_vol
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
                if native:
                    M = W if k in (0, 2) else H
                    c0 = sv if k in (0, 3) else sv - M + 1
                    K.readout_native(ln.buf, L, M, c0, inv_temp, qi + k * q, ln.nat[k, :L, :M],
                                     ln.nat_a[k, :L, :M], self.head_max, self.head_arg)
                else:
                    K.readout_tiled(ln.buf, k, su, sv, inv_temp, qi + k * q, ln.best, ln.best_a, self.head_max,
                                    self.head_arg, v, write_vol, self.modtab)
        if native:
            K.merge_native(ln.nat, ln.nat_a, self.head_arg, q, first, step, ln.best, ln.best_a)


class _CircleEngineCV(_CircleEngine):
    """:class:`_CircleEngine` with single-precision transforms by OpenCV (``cv2.dft``), for the coarse level.

    The same quarter-turn scheme: the four turned maps' spectra once per window, A/4 rotated templates
    transformed, the feature sum in the frequency domain (:func:`_kernels.mac_ccs`), one inverse per
    heading. OpenCV transforms the whole (N, N) array in one call (float32, packed layout, N even); its
    full 2-D transform of a 168 x 168 array took 37 us against 115 us for numpy's double-precision pair of
    passes (docs/correlator.md). The inverse is the whole cyclic correlation; the window's rows are read
    from it in place (:func:`_kernels.readout_native_rows`).
    """

    def __init__(self, F, H, W, bev_shape, origin_row, origin_col, A, threads=1):
        N = self._geometry(F, H, W, bev_shape, origin_row, origin_col, A, _even_fast_size)
        self.K = N // 2 + 1  # column frequencies of a real transform (the benchmark's FLOP count); spectra (N, N)
        self.G4 = np.zeros((4, F, N, N), np.float32)
        self.lanes = [_LaneCV(F, self.SU, self.SV, N, max(H, W), H, W) for _ in range(threads)]
        self._buffers(threads)

    def set_map(self, G):
        import cv2
        for f, k, g in self._quarter_turns(G):
            cv2.dft(g, dst=self.G4[k, f])

    def _run_lane(self, ln, first, step, feat, inv_temp, v, write_vol):
        import cv2
        ln.best.fill(-np.inf)
        ln.nat.fill(-np.inf)
        N, q = self.N, self.A // 4
        H, W, F = self.H, self.W, self.F
        orow, ocol = self.origin
        scale = inv_temp / (N * N)  # OpenCV's inverse is unnormalized
        for qi in range(first, q, step):
            K.rotate_into(feat, self.cos[qi], self.sin[qi], orow, ocol, self.lo_u[qi], self.lo_v[qi], ln.canvas_v)
            for f in range(F):
                cv2.dft(ln.canvas[f], dst=ln.T[f])
            su, sv = int(self.lo_u[qi]), int(self.lo_v[qi])
            for k in range(4):
                K.mac_ccs(self.G4[k], ln.T, F, ln.P)
                cv2.idft(ln.P, dst=ln.buf, flags=cv2.DFT_REAL_OUTPUT)
                r0, L = self.rows[k, qi]
                if write_vol:
                    K.readout_tiled(ln.buf[(np.arange(L) + r0) % N], k, su, sv, scale, qi + k * q, ln.best,
                                    ln.best_a, self.head_max, self.head_arg, v, write_vol, self.modtab)
                else:
                    M = W if k in (0, 2) else H
                    c0 = sv if k in (0, 3) else sv - M + 1
                    K.readout_native_rows(ln.buf, r0, L, M, c0, scale, qi + k * q, ln.nat[k, :L, :M],
                                          ln.nat_a[k, :L, :M], self.head_max, self.head_arg)
        if not write_vol:
            K.merge_native(ln.nat, ln.nat_a, self.head_arg, q, first, step, ln.best, ln.best_a)


class _LaneCV:
    """Per-thread buffers of a :class:`_CircleEngineCV` (float32, packed spectra)."""

    def __init__(self, F, SU, SV, N, L, H, W):
        self.canvas = np.zeros((F, N, N), np.float32)  # entries outside (SU, SV) stay 0
        self.canvas_v = self.canvas[:, :SU, :SV]
        self.T = np.zeros((F, N, N), np.float32)
        self.P = np.zeros((N, N), np.float32)
        self.buf = np.zeros((N, N), np.float32)
        self.best = np.zeros((H, W), np.float32)
        self.best_a = np.zeros((H, W), np.int16)
        self.nat = np.zeros((4, L, L), np.float32)
        self.nat_a = np.zeros((4, L, L), np.int16)

    @property
    def nbytes(self) -> int:
        return sum(a.nbytes for a in (self.canvas, self.T, self.P, self.buf, self.best, self.best_a, self.nat,
                                      self.nat_a))


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
        # Per-quarter maxima in the inverse buffers' own orientation (see readout_native).
        self.nat = np.zeros((4, L, L), np.float32)
        self.nat_a = np.zeros((4, L, L), np.int16)

    @property
    def nbytes(self) -> int:
        return sum(a.nbytes for a in (self.canvas, self.trow, self.Tin, self.T, self.P4, self.Q, self.Qr, self.buf,
                                      self.best, self.best_a, self.nat, self.nat_a))


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
        b, UU, UV, SU, SV = _heading_boxes(bev_shape, origin_row, origin_col, A, n_head)
        self.bounds = b  # (A, 4): lo_u, hi_u, lo_v, hi_v per heading
        self.cos = np.cos(2.0 * math.pi * np.arange(A) / A)
        self.sin = np.sin(2.0 * math.pi * np.arange(A) / A)
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


class _SupportPatchEngine:
    """Exact FFT correlation over a few headings and an (Ho, Ho) block of cells, sized per frame.

    The same correlation as :class:`_PatchEngine`, but each call first finds where this frame's
    features are nonzero (the camera's visible wedge: 46 x 38 cells of the 64 x 64 grid on the
    live loop's frames) and which features are nonzero at all (a frame without buildings has an
    all-zero building feature). Only those features are transformed, over the offset boxes of
    that support rectangle rather than of the whole grid, and the FFT sizes follow (about
    100-110 instead of 150 on the loop's frames). Buffers are allocated once for the largest
    case (the whole grid, every feature, the ``Ho`` and ``n_head`` of the construction); a call
    may ask for a smaller block and fewer headings and works in contiguous views of the same
    memory.

    Spectra are kept in (row frequency, column frequency) order: the second pass of each 2-D
    transform runs along axis 1 (pocketfft buffers the strided columns itself, measured a
    little faster than an explicit transpose), and the inverse's rows that land in the output
    block are a contiguous slab. Nothing wraps: every read of a patch index stays below the
    patch size, as in :class:`_PatchEngine`. With ``threads = 2`` the headings alternate
    between two lanes of per-heading buffers (numpy's FFT and the nogil kernels release the GIL).
    """

    def __init__(self, F, Ho, n_head, bev_shape, origin_row, origin_col, A, threads=1, groups=2):
        self.F, self.Ho, self.n_head, self.A = F, Ho, n_head, A
        self.origin = (float(origin_row), float(origin_col))
        self.bev_shape = bev_shape
        _, UU, UV, self.SU, _ = _heading_boxes(bev_shape, origin_row, origin_col, A, n_head)
        self.cos = np.cos(2.0 * math.pi * np.arange(A) / A)
        self.sin = np.sin(2.0 * math.pi * np.arange(A) / A)
        self.Nr = _fast_size(Ho + UU - 1)  # the largest sizes (the whole grid in view)
        self.Nc = _fast_size(Ho + UV - 1)
        self.N = max(self.Nr, self.Nc)
        self._good = np.array([_fast_size(n) for n in range(self.N + 1)], np.int64)
        Kh = self.Nc // 2 + 1
        self.groups = max(1, int(groups))
        self.lanes = [_PatchLane(F, self.SU, self.Nr, self.Nc, Kh, Ho) for _ in range(threads)]
        self._vol = np.zeros(n_head * Ho * Ho, np.float32)
        self.vol = self._vol.reshape(n_head, Ho, Ho)
        self.featA = np.zeros((F,) + tuple(bev_shape), np.float32)
        self.act = np.zeros(F, np.int64)
        self.hb = np.zeros((n_head, 4), np.int64)
        self.last_sizes = (0, 0, 0)  # (Nr, Nc, features transformed) of the last call
        self._pool = None
        if threads > 1:
            from concurrent.futures import ThreadPoolExecutor
            self._pool = ThreadPoolExecutor(max_workers=threads - 1, thread_name_prefix="tinyloc-track")

    @property
    def nbytes(self) -> int:
        return sum(ln.nbytes for ln in self.lanes) + self._vol.nbytes + self.featA.nbytes + self.hb.nbytes

    def run(self, feat, G, row0, col0, a0, A, inv_temp, Ho=None, n_head=None):
        """Volume (n_head, Ho, Ho) for headings a0..a0+n_head-1 and cells (row0 + u, col0 + v) of the window G:
        a contiguous view of this engine's memory (``self.vol`` at the construction's sizes)."""
        Ho = self.Ho if Ho is None else Ho
        nh = self.n_head if n_head is None else n_head
        vol = self._vol[:nh * Ho * Ho].reshape(nh, Ho, Ho)
        n, r_lo, r_hi, c_lo, c_hi = K.feature_support(feat, self.act)
        if n == 0:
            vol.fill(0.0)  # nothing in view: every pose scores 0 (the exact value)
            self.last_sizes = (0, 0, 0)
            return vol
        K.gather_features(feat, self.act, n, self.featA)
        for ln in self.lanes:
            ln.sizes = (0, 0)
        ng = min(self.groups, nh)
        per = -(-nh // ng)
        job = (n, G, row0, col0, Ho, a0, A, inv_temp, vol, (r_lo, r_hi, c_lo, c_hi), per, nh)
        L = len(self.lanes)
        if L == 1:
            for s0 in range(0, nh, per):
                self._run_group(self.lanes[0], s0, job)
        else:
            # Lane w takes groups w, w + L, ...: each has its own patch, so the lanes share nothing but the output.
            futs = [self._pool.submit(self._run_groups, self.lanes[w], w, L, job) for w in range(1, L)]
            self._run_groups(self.lanes[0], 0, L, job)
            for fu in futs:
                fu.result()
        self.last_sizes = (max(ln.sizes[0] for ln in self.lanes), max(ln.sizes[1] for ln in self.lanes), n)
        return vol

    def _run_groups(self, ln, first, step, job):
        per, nh = job[-2], job[-1]
        for s0 in range(first * per, nh, step * per):
            self._run_group(ln, s0, job)

    def _run_group(self, ln, s0, job):
        """Headings s0 .. s0 + per - 1 of the call: their own map patch (the union of their boxes), then each one."""
        n, G, row0, col0, Ho, a0, A, inv_temp, vol, (r_lo, r_hi, c_lo, c_hi), per, nh = job
        m = min(per, nh - s0)
        hb = self.hb[s0:s0 + m]
        orow, ocol = self.origin
        LU, HU, LV, HV = K.support_bounds(r_lo, r_hi, c_lo, c_hi, orow, ocol, self.cos, self.sin, a0 + s0, A, hb)
        Nr = int(self._good[Ho + HU - LU])
        Nc = int(self._good[Ho + HV - LV])
        Kh = Nc // 2 + 1
        ln.sizes = (max(ln.sizes[0], Nr), max(ln.sizes[1], Nc))
        patch = ln.patch[:n * Nr * Nc].reshape(n, Nr, Nc)
        Gin = ln.Gin[:n * Nr * Kh].reshape(n, Nr, Kh)
        Gs = ln.Gs[:n * Nr * Kh].reshape(n, Nr, Kh)
        # Patch cell (r, c) = window cell (row0 + LU + r, col0 + LV + c); outside the window 0.
        K.fill_patch(G, self.act, row0 + LU, col0 + LV, patch)
        np.fft.rfft(patch, axis=2, out=Gin)
        np.fft.fft(Gin, axis=1, out=Gs)
        Tin = ln.Tin[:n * Nr * Kh].reshape(n, Nr, Kh)
        T = ln.T[:n * Nr * Kh].reshape(n, Nr, Kh)
        P = ln.P[:Nr * Kh].reshape(Nr, Kh)
        Q = ln.Q[:Nr * Kh].reshape(Nr, Kh)
        buf = ln.buf[:Ho * Nc].reshape(Ho, Nc)
        su_prev = Nr  # rows of Tin beyond this heading's template rows must be 0
        for k in range(m):
            t = s0 + k
            a = (a0 + t) % A
            lu, lv = int(hb[k, 0]), int(hb[k, 2])
            su = int(hb[k, 1]) - lu + 1
            canvas = ln.canvas[:n * su * Nc].reshape(n, su, Nc)
            K.rotate_support(self.featA[:n], self.cos[a], self.sin[a], orow, ocol, lu, lv, r_lo, r_hi, c_lo, c_hi,
                             canvas)
            np.fft.rfft(canvas, axis=2, out=Tin[:, :su])
            if su < su_prev:
                Tin[:, su:su_prev].fill(0.0)
            su_prev = su
            np.fft.fft(Tin, axis=1, out=T)
            K.spectra_mac1(Gs, T, P)
            np.fft.ifft(P, axis=0, out=Q)
            # Output cell u, template row k read patch row u + (lu - LU) + k (<= Ho - 1 + HU - LU < Nr).
            r0 = lu - LU
            np.fft.irfft(Q[r0:r0 + Ho], n=Nc, axis=1, out=buf)
            K.readout_patch(buf, 0, lv - LV, inv_temp, vol[t])


def _even_fast_size(n: int) -> int:
    """Smallest m >= n, a multiple of 4 whose only prime factors are 2, 3, 5, 7: the packed spectra of ``cv2.dft``
    need even sides, and OpenCV's transform was measured faster at such sizes than at the 2-3-5-smooth ones in
    between (forward + inverse of an m x m array: 84 and 96 against 90, 112 against 108 and 120, 168 against 180)."""
    m = max(4, n)
    while True:
        if m % 4 == 0:
            k = m
            for p in (2, 3, 5, 7):
                while k % p == 0:
                    k //= p
            if k == 1:
                return m
        m += 1


class _SupportPatchEngineCV(_SupportPatchEngine):
    """:class:`_SupportPatchEngine` with single-precision transforms by OpenCV (``cv2.dft``, already a dependency).

    The same correlation, the same patch and heading boxes; the spectra are float32 in OpenCV's packed layout
    (sides even) and the frequency-domain sum is :func:`_kernels.mac_ccs`. OpenCV's 2-D real transform of a
    whole (Nr, Nc) array was measured 2-3x faster than numpy's double-precision pair of 1-D passes at the
    tracking sizes (docs/correlator.md); the volume differs from the double-precision one only by float32
    rounding of the transforms (a few 1e-7 of the peak, tests).
    """

    def __init__(self, F, Ho, n_head, bev_shape, origin_row, origin_col, A, threads=1, groups=2):
        super().__init__(F, Ho, n_head, bev_shape, origin_row, origin_col, A, threads=threads, groups=groups)
        self.Nr = _even_fast_size(self.Nr)
        self.Nc = _even_fast_size(self.Nc)
        self.N = max(self.Nr, self.Nc)
        self._good = np.array([_even_fast_size(n) for n in range(self.N + 1)], np.int64)
        self.lanes = [_PatchLaneCV(F, self.Nr, self.Nc) for _ in range(threads)]
        self.featA = np.zeros((F,) + tuple(bev_shape), np.float32)

    def _run_group(self, ln, s0, job):
        import cv2
        n, G, row0, col0, Ho, a0, A, inv_temp, vol, (r_lo, r_hi, c_lo, c_hi), per, nh = job
        m = min(per, nh - s0)
        hb = self.hb[s0:s0 + m]
        orow, ocol = self.origin
        LU, HU, LV, HV = K.support_bounds(r_lo, r_hi, c_lo, c_hi, orow, ocol, self.cos, self.sin, a0 + s0, A, hb)
        Nr = int(self._good[Ho + HU - LU])
        Nc = int(self._good[Ho + HV - LV])
        ln.sizes = (max(ln.sizes[0], Nr), max(ln.sizes[1], Nc))
        sz = Nr * Nc
        patch = ln.patch[:n * sz].reshape(n, Nr, Nc)
        Gs = ln.Gs[:n * sz].reshape(n, Nr, Nc)
        K.fill_patch(G, self.act, row0 + LU, col0 + LV, patch)
        for k in range(n):
            cv2.dft(patch[k], dst=Gs[k])
        canvas = ln.canvas[:n * sz].reshape(n, Nr, Nc)
        T = ln.T[:n * sz].reshape(n, Nr, Nc)
        P = ln.P[:sz].reshape(Nr, Nc)
        buf = ln.buf[:sz].reshape(Nr, Nc)
        scale = inv_temp / sz  # OpenCV's inverse is unnormalized
        canvas.fill(0.0)  # the views' shapes change between calls
        su_prev = 0
        for k in range(m):
            t = s0 + k
            a = (a0 + t) % A
            lu, lv = int(hb[k, 0]), int(hb[k, 2])
            su = int(hb[k, 1]) - lu + 1
            # rotate_support writes every entry of the rows < su; rows a taller heading left must be 0 again
            K.rotate_support(self.featA[:n], self.cos[a], self.sin[a], orow, ocol, lu, lv, r_lo, r_hi, c_lo, c_hi,
                             canvas[:, :su])
            if su < su_prev:
                canvas[:, su:su_prev].fill(0.0)
            su_prev = su
            for f in range(n):
                cv2.dft(canvas[f], dst=T[f])
            K.mac_ccs(Gs, T, n, P)
            cv2.idft(P, dst=buf, flags=cv2.DFT_REAL_OUTPUT)
            K.readout_patch(buf, lu - LU, lv - LV, scale, vol[t])


class _PatchLaneCV:
    """Per-thread buffers of a :class:`_SupportPatchEngineCV` (float32, largest sizes)."""

    def __init__(self, F, Nr, Nc):
        self.patch = np.zeros(F * Nr * Nc, np.float32)
        self.Gs = np.zeros(F * Nr * Nc, np.float32)
        self.canvas = np.zeros(F * Nr * Nc, np.float32)
        self.T = np.zeros(F * Nr * Nc, np.float32)
        self.P = np.zeros(Nr * Nc, np.float32)
        self.buf = np.zeros(Nr * Nc, np.float32)
        self.sizes = (0, 0)

    @property
    def nbytes(self) -> int:
        return sum(a.nbytes for a in (self.patch, self.Gs, self.canvas, self.T, self.P, self.buf))


class _PatchLane:
    """Per-thread buffers of a :class:`_SupportPatchEngine` (a group's map patch and one heading, largest sizes)."""

    def __init__(self, F, SU, Nr, Nc, Kh, Ho):
        self.patch = np.zeros(F * Nr * Nc, np.float64)
        self.Gin = np.zeros(F * Nr * Kh, np.complex128)
        self.Gs = np.zeros(F * Nr * Kh, np.complex128)
        self.sizes = (0, 0)  # largest (Nr, Nc) of the lane's groups in the last call
        self.canvas = np.zeros(F * SU * Nc, np.float64)
        self.Tin = np.zeros(F * Nr * Kh, np.complex128)
        self.T = np.zeros(F * Nr * Kh, np.complex128)
        self.P = np.zeros(Nr * Kh, np.complex128)
        self.Q = np.zeros(Nr * Kh, np.complex128)
        self.buf = np.zeros(Ho * Nc, np.float64)

    @property
    def nbytes(self) -> int:
        return sum(a.nbytes for a in (self.patch, self.Gin, self.Gs, self.canvas, self.Tin, self.T, self.P, self.Q,
                                      self.buf))


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
        self._Gc = np.zeros((F, H // 2, W // 2), np.float32)
        self._best_heading_c = np.zeros((H // 2, W // 2), np.int16)  # fast search's per-cell heading, 2-step units
        self._scratch = np.zeros((H, W), np.float32)
        self._inv_temp = 1.0 / self.model.temperature
        self._fine = self._coarse = self._track = self._track_c = None  # allocated at first use (or warm_up)
        self._scorer = _PoseScorer(F, p, kmax=max(512, p.coarse_top_k * p.coarse_budget_max))
        self._G_hwf8 = np.zeros((H, W, self._scorer.FP), np.float32)  # cell-major map features, for direct sums
        self._pw_fine = PeakWork(p.window_shape)
        self._pw_coarse = PeakWork((H // 2, W // 2), kmax=max(64, p.coarse_top_k * p.coarse_budget_max))
        self._pw_track = PeakWork((2 * p.track_half_headings + 1,) + (2 * p.track_radius_cells + 1,) * 2)
        self._pw_track_c = PeakWork((2 * ((p.track_half_headings + 1) // 2) + 1,)
                                    + (2 * ((p.track_radius_cells + 1) // 2) + 1,) * 2)
        self._have_map = False
        self._calls = 0
        self.last_refine = (p.coarse_top_k, p.coarse_climb)  # (hypotheses, climbs) of the last fast search
        self.last_exact_before_tie_rule = None  # best mode of the last exact search before its tie rule

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
            cls = _CircleEngineCV if p.fft == "opencv" else _CircleEngine
            self._coarse = cls(self.model.n_features, H // 2, W // 2, (h // 2, w // 2), p.origin_row / 2,
                               p.origin_col / 2, p.n_headings // p.coarse_step, p.threads)
            if self._have_map:
                self._coarse.set_map(self._Gc)
        return self._coarse

    def _track_engine(self) -> "_PatchEngine":
        if self._track is None:
            p = self.params
            self._track = self._patch_engine(2 * p.track_radius_cells + 1, 2 * p.track_half_headings + 1,
                                             p.bev_shape, p.origin_row, p.origin_col, p.n_headings)
        return self._track

    def _track_engine_coarse(self) -> "_PatchEngine":
        if self._track_c is None:
            p = self.params
            h, w = p.bev_shape
            self._track_c = self._patch_engine(2 * ((p.track_radius_cells + 1) // 2) + 1,
                                               2 * ((p.track_half_headings + 1) // 2) + 1, (h // 2, w // 2),
                                               p.origin_row / 2, p.origin_col / 2, p.n_headings // 2)
        return self._track_c

    def _patch_engine(self, Ho, n_head, bev_shape, origin_row, origin_col, A):
        p, F = self.params, self.model.n_features
        if p.track_engine == "fixed":
            return _PatchEngine(F, Ho, n_head, bev_shape, origin_row, origin_col, A)
        cls = _SupportPatchEngineCV if p.fft == "opencv" else _SupportPatchEngine
        return cls(F, Ho, n_head, bev_shape, origin_row, origin_col, A, threads=p.track_threads)

    # -- set-up ----------------------------------------------------------------------------
    @property
    def workspace_bytes(self) -> int:
        """Bytes of the working buffers allocated so far (engines are allocated at first use)."""
        return sum(self.workspace_report().values())

    def workspace_report(self) -> dict:
        """Bytes per part of the workspace: shared buffers, and each engine allocated so far."""
        shared = sum(a.nbytes for a in (self._feat, self._feat_c, self._G, self._G_hwf8, self._Gc, self._scratch,
                                         self._best_heading_c))
        shared += self._pw_fine.nbytes + self._pw_coarse.nbytes + self._pw_track.nbytes + self._pw_track_c.nbytes
        shared += self._scorer.nbytes
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
        self._calls += 1  # results of earlier calls are stale now
        self.model.map_features(window, out=self._G, scratch=self._scratch)
        K.downsample2(self._G, self._Gc)
        K.map_hwf(self._G, self._G_hwf8)
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
        # Evidence everywhere: every feature nonzero over the whole grid, so the tracking engines run every kernel
        # (an empty grid short-cuts them) at their largest sizes (every buffer page touched once).
        z = np.full((NUM_MAP_CLASSES,) + p.bev_shape, 0.1, np.float32)
        bev = SyntheticBev(z, z[0], z[0], p.res_m, p.origin_row, p.origin_col)
        had = self._have_map
        if not had:
            self.set_map(np.zeros((NUM_MAP_CLASSES,) + p.window_shape, np.float32))
        if "exact" in modes:
            self.search(bev)
        if "fast" in modes:
            self.search_fast(bev)
        if "track" in modes:
            self.track(bev, p.window_shape[0] // 2, p.window_shape[1] // 2, 0).modes  # noqa: B018 (compiles them)
        if "track_exact" in modes:
            self.track(bev, p.window_shape[0] // 2, p.window_shape[1] // 2, 0, exact=True).modes  # noqa: B018
        self._have_map = had

    # -- per frame -------------------------------------------------------------------------
    def _prepare(self, bev) -> str:
        p = self.params
        self._calls += 1  # every per-frame call; lazily computed results check it
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
        modes = find_modes(e.best, e.best_a, self._pw_fine, 1, p.n_modes, p.mode_radius_cells,
                           p.mode_radius_headings, p.n_headings)
        self._scorer.new_frame(self._feat)
        modes = self._scorer.climb(self._G_hwf8, modes, self._inv_temp, max_steps=0)
        modes.sort(key=self._rank)
        self.last_exact_before_tie_rule = modes[0] if modes else None  # for the benchmark's agreement figures
        modes = self._tie_rule(modes)
        return SearchResult(e.best, e.best_a, e.head_max, e.head_arg, modes=modes, volume=volume)

    def search_fast(self, bev) -> SearchResult:
        """Coarse-to-fine full search.

        The exact search runs at half resolution (1 m cells, A / ``params.coarse_step``
        headings); its ``coarse_top_k`` best non-suppressed hypotheses are scored exactly at
        full resolution under them (4 cells at their heading, +- ``start_heading_reach``), and the best
        ``coarse_climb`` of those climb the exact score to a local maximum and are refined
        below a cell and a heading step. Reduced forms are those of the coarse level
        (``scale = 2``; ``best_heading`` in steps of 2 full headings).
        """
        p, e = self.params, self._coarse_engine()
        hs = p.coarse_step
        mult = max(1, hs // 2)  # coarse heading index -> steps of 2 full headings (1 when hs <= 2)
        out_hs = hs // mult
        best_heading = e.best_a if mult == 1 else self._best_heading_c
        status = self._prepare(bev)
        if status != "ok":
            return SearchResult(e.best, best_heading, e.head_max, e.head_arg, scale=2, heading_scale=out_hs,
                                heading_max_scale=hs, ok=False, status=status)
        K.downsample2(self._feat, self._feat_c)
        # x4: a 2x2 block-mean score sums 4x fewer cells; this puts it on the full-resolution scale.
        e.run(self._feat_c, 4.0 * self._inv_temp, None)
        if mult != 1:
            np.multiply(e.best_a, mult, out=best_heading)
        top_k, n_climb = p.coarse_top_k, p.coarse_climb
        rc, rh = max(1, p.mode_radius_cells // 2), max(1, p.mode_radius_headings // hs)
        climb_rh = p.climb_heading_radius
        if p.coarse_budget_cells:
            cells = K.support_cells(self._feat)
            if 0 < cells < p.coarse_budget_cells:  # nothing seen: every pose scores 0, nothing to look for
                f = min(float(p.coarse_budget_max), p.coarse_budget_cells / max(1, cells))
                top_k, n_climb = int(round(top_k * f)), int(round(n_climb * f))
                if f >= 4.0:
                    # denser starts and a wider look in heading too: a little evidence gives a ragged surface
                    # with maxima close together, and each exact score is cheap
                    rc, rh, climb_rh = 1, 1, max(climb_rh, p.budget_climb_heading_radius)
        self.last_refine = (top_k, n_climb)
        pw = self._pw_coarse
        n = K.nms_profile(e.best, e.best_a, p.n_headings // hs, min(top_k, pw.i.shape[0]), rc, rh, pw.work, pw.i,
                          pw.j, pw.a, pw.v)
        sc = self._scorer
        sc.new_frame(self._feat)
        # arrays from here to the last step: a few hundred hypotheses make no Python objects
        fine = sc.refine_hypotheses(self._G_hwf8, pw, n, self._inv_temp, scale=2, heading_scale=hs,
                                    heading_reach=p.start_heading_reach, n_climb=n_climb, heading_radius=climb_rh,
                                    n_modes=p.n_modes)
        modes = self._tie_rule(fine)
        return SearchResult(e.best, best_heading, e.head_max, e.head_arg, modes=modes, scale=2,
                            heading_scale=out_hs, heading_max_scale=hs)

    def track(self, bev, row: float, col: float, heading_index: int, *, exact: bool = False,
              radius_cells: int | None = None, half_headings: int | None = None) -> TrackResult:
        """Tracking update around a prior: +-radius_cells and +-half_headings (by default the parameters'
        ``track_radius_cells`` and ``track_half_headings``, also the largest a call may ask for).

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
            True: the exact full-resolution volume over the window.
        radius_cells : int, optional
            Half size of this call's box in full-resolution cells, 1 .. ``track_radius_cells``:
            a filter whose posterior is tight asks for less and pays less (the FFT sizes follow).
            At ``exact=False`` the half-resolution box is ``(radius_cells + 1) // 2`` cells.
        half_headings : int, optional
            Headings each side of the prior, 0 .. ``track_half_headings`` (full steps; at
            ``exact=False`` ``(half_headings + 1) // 2`` half-resolution steps).

        The volume's shape follows: (2 hh + 1, 2 R + 1, 2 R + 1) at ``exact=True``.
        """
        p = self.params
        R = p.track_radius_cells if radius_cells is None else int(radius_cells)
        hh = p.track_half_headings if half_headings is None else int(half_headings)
        if not 1 <= R <= p.track_radius_cells or not 0 <= hh <= p.track_half_headings:
            raise InputError(f"tracking box: radius_cells must be 1..{p.track_radius_cells} and half_headings "
                             f"0..{p.track_half_headings} (the sizes allocated), got {R} and {hh}")
        if exact:
            e = self._track_engine()
            row0, col0 = int(round(row)) - R, int(round(col)) - R
            a0 = (int(heading_index) - hh) % p.n_headings
            Ho, nh = 2 * R + 1, 2 * hh + 1
        else:
            e = self._track_engine_coarse()
            Rc, hc = (R + 1) // 2, (hh + 1) // 2
            row0, col0 = int(round(row)) // 2 - Rc, int(round(col)) // 2 - Rc
            a0 = (int(round(heading_index / 2.0)) - hc) % (p.n_headings // 2)
            Ho, nh = 2 * Rc + 1, 2 * hc + 1
        full = Ho == e.Ho and nh == e.n_head
        status = self._prepare(bev)
        if status != "ok":
            vol = e.vol if full else e.vol.reshape(-1)[:nh * Ho * Ho].reshape(nh, Ho, Ho)
            return TrackResult(vol, row0, col0, a0, scale=1 if exact else 2, ok=False, status=status)
        if not full and isinstance(e, _PatchEngine):
            raise InputError("tracking box: a smaller box per call needs track_engine='support'")
        if exact:
            vol = e.run(self._feat, self._G, row0, col0, a0, p.n_headings, self._inv_temp, *(() if full else (Ho, nh)))
            vol = e.vol if vol is None else vol
            return TrackResult(vol, row0, col0, a0, _make=lambda: self._track_modes(vol, row0, col0, a0, True),
                               _owner=self)
        K.downsample2(self._feat, self._feat_c)
        vol = e.run(self._feat_c, self._Gc, row0, col0, a0, p.n_headings // 2, 4.0 * self._inv_temp,
                    *(() if full else (Ho, nh)))
        vol = e.vol if vol is None else vol
        return TrackResult(vol, row0, col0, a0, scale=2, _make=lambda: self._track_modes(vol, row0, col0, a0, False),
                           _owner=self)

    def _track_modes(self, vol, row0, col0, a0, exact: bool) -> list:
        """Modes of the last tracking volume: its own maxima (exact), or the best ``track_refine`` coarse
        maxima climbed to local maxima of the exact full-resolution score."""
        p = self.params
        if exact:
            return modes_of_volume(vol, row0, col0, a0, p.n_headings, self._pw_track, p.n_modes,
                                   p.mode_radius_cells, p.mode_radius_headings)
        cands = modes_of_volume(vol, row0, col0, a0, p.n_headings // 2, self._pw_track_c, p.track_refine,
                                max(1, p.mode_radius_cells // 2), max(1, p.mode_radius_headings // 2))
        sc = self._scorer
        sc.new_frame(self._feat)
        starts = sc.best_under(self._G_hwf8, cands, self._inv_temp, scale=2, heading_scale=2)
        return _distinct(sc.climb(self._G_hwf8, starts, self._inv_temp, max_steps=16,
                                  heading_radius=p.climb_heading_radius), p, p.n_modes)

    def _rank(self, m):
        """Sort key of modes: higher exact score first; among equal scores the lower flat index (a, i, j)."""
        H, W = self.params.window_shape
        a, i, j = m.cell
        return (-m.cell_loglik, (a * H + i) * W + j)

    def _tie_rule(self, modes: list) -> list:
        """Walk the near-best plateau of the modes within ``plateau_tol`` of the best (``plateau_budget``), then
        rank again (the rule both full searches end with)."""
        p = self.params
        if not p.plateau_budget or not modes:
            return modes
        top = modes[0].cell_loglik
        band = top - p.plateau_tol * abs(top)
        near = [m for m in modes[:4] if m.cell_loglik >= band]
        walked = self._scorer.walk(self._G_hwf8, near, self._inv_temp, p.plateau_tol, p.plateau_budget)
        return _distinct(walked + modes, p, p.n_modes, self._rank)

    def pose_of(self, mode: Mode) -> tuple[float, float, float]:
        """(row, col, yaw_rad) of a mode: continuous window cell of the robot origin and its yaw."""
        return mode.row + 0.5, mode.col + 0.5, float(wrap_angle(mode.heading * self.params.dyaw))


def _distinct(modes, p, n, key=None):
    """Best first, dropping modes within the suppression radius of a better one (climbs can converge)."""
    out = []
    for m in sorted(modes, key=key or (lambda m: -m.cell_loglik)):
        if all(not _near(m, o, p) for o in out):
            out.append(m)
        if len(out) == n:
            break
    return out


def _near(m, o, p) -> bool:
    dh = abs((m.heading - o.heading + p.n_headings / 2) % p.n_headings - p.n_headings / 2)
    return abs(m.row - o.row) <= p.mode_radius_cells and abs(m.col - o.col) <= p.mode_radius_cells \
        and dh <= p.mode_radius_headings


class _PoseScorer:
    """Exact scores at chosen poses by direct sums (numba), for the refinement of modes.

    Only A/4 rotated grids are ever sampled: the grid of heading a is the grid of the
    base heading ``a mod A/4`` turned by exact quarter turns (the identity the FFT engines
    use). Each base grid is rotated and compacted (only cells with evidence: the
    camera's visible wedge) at most once per frame, on first use, into a fixed pool
    sized for a fully visible grid. Climbs and the scoring under coarse hypotheses run
    inside one kernel call each. Features are padded to ``FP`` lanes (a multiple of 8).
    """

    CUBE_CELLS = 8  # half size of the per-climb score cache (cells) ...
    CUBE_HEADINGS = 8  # ... and headings

    def __init__(self, F, p: CorrelatorParams, kmax: int = 512):
        self.FP = 8 * ((F + 7) // 8)  # lanes: 8 for the shipped model (F = 6)
        self.p = p
        A = p.n_headings
        Q = A // 4
        h, w = p.bev_shape
        yaws = [2.0 * math.pi * b / A for b in range(Q)]
        self.cos_b = np.cos(yaws)
        self.sin_b = np.sin(yaws)
        self.box = np.array([template_bounds(p.bev_shape, p.origin_row, p.origin_col, y) for y in yaws], np.int64)
        self.feat_hwf = np.zeros((h, w, self.FP), np.float32)
        self.colmin = np.zeros(h, np.int64)
        self.colmax = np.zeros(h, np.int64)
        # Pool capacity: the support of a grid of ones contains the support of any grid.
        ones = np.ones((h, w, self.FP), np.float32)
        full_lo, full_hi = np.zeros(h, np.int64), np.full(h, w - 1, np.int64)
        cap = 1
        for b in range(Q):
            lu, hu, lv, hv = (int(x) for x in self.box[b])
            n = (hu - lu + 1) * (hv - lv + 1)
            cap = max(cap, 1 + K.rotate_compact_rows(ones, full_lo, full_hi, self.cos_b[b], self.sin_b[b],
                                                     p.origin_row, p.origin_col, lu, lv, hu - lu + 1, hv - lv + 1,
                                                     np.zeros((n + 1, 2), np.int16),
                                                     np.zeros((n + 1, self.FP), np.float32)))
        self.uv = np.zeros((Q, cap, 2), np.int16)  # offsets are within +-reach
        self.vals = np.zeros((Q, cap, self.FP), np.float32)
        self.count = np.zeros(Q, np.int64)
        self.bnd = np.zeros((Q, 4), np.int64)
        self.valid = np.zeros(Q, np.bool_)
        self.fr = (self.feat_hwf, self.colmin, self.colmax, self.cos_b, self.sin_b, self.box, float(p.origin_row),
                   float(p.origin_col))
        self.acc8 = np.zeros(self.FP, np.float64)
        self.cube = np.zeros((2 * self.CUBE_HEADINGS + 1,) + (2 * self.CUBE_CELLS + 1,) * 2, np.float64)
        self.kmax = kmax
        self.cells_in = np.zeros((kmax, 3), np.int64)
        self.cells_out = np.zeros((kmax, 3), np.int64)
        self.score_out = np.zeros(kmax, np.float64)
        self.nb = np.zeros((kmax, 7), np.float64)
        self.order = np.zeros(kmax, np.int64)
        # the plateau walk's table of scored poses (open addressing, at most half full) and queue
        wb = max(1, p.plateau_budget)
        size = 1 << max(10, int(math.ceil(math.log2(4 * wb))))
        self.walk_keys = np.full(size, -1, np.int64)
        self.walk_vals = np.zeros(size, np.float64)
        self.walk_queue = np.zeros(wb, np.int64)
        self.walk_evals = 0  # poses scored by the last walk (all its modes)

    @property
    def nbytes(self) -> int:
        return sum(a.nbytes for a in (self.walk_keys, self.walk_vals, self.walk_queue, self.order,
                                      self.uv, self.vals, self.count, self.bnd, self.valid, self.feat_hwf, self.cube,
                                      self.cells_in, self.cells_out, self.score_out, self.nb, self.colmin,
                                      self.colmax))

    def new_frame(self, feat) -> None:
        """Take this frame's bird's-eye features (F, h, w); forget the rotated grids of the last one."""
        K.features_hwf(feat, self.colmin, self.colmax, self.feat_hwf)
        self.valid.fill(False)

    def _load(self, modes) -> int:
        n = min(len(modes), self.kmax)
        for k in range(n):
            self.cells_in[k] = modes[k].cell
        return n

    def best_under(self, G, modes, inv_temp, *, scale: int, heading_scale: int, heading_reach: int = 1) -> list:
        """For each coarse mode, the best exact full-resolution pose under it (a full-resolution Mode).

        ``G`` is the map features in (H, W, FP) layout.
        """
        n = self._load(modes)
        K.best_under(self.cells_in[:n], heading_scale, scale, heading_reach, self.p.n_headings, self.fr, self.uv,
                     self.vals, self.count, self.bnd, self.valid, G, self.acc8, self.cells_out[:n],
                     self.score_out[:n])
        out = []
        for k in range(n):
            a, i, j = (int(x) for x in self.cells_out[k])
            v = float(self.score_out[k]) * inv_temp
            out.append(Mode(float(i), float(j), float(a), v, (a, i, j), v))
        return out

    def walk(self, G, modes, inv_temp, tol_frac: float, budget: int) -> list:
        """Each mode walked over its near-best plateau (:func:`_kernels.walk_plateau`), refined below a cell."""
        budget = min(budget, self.walk_queue.shape[0])
        self.walk_evals = 0
        H, W = self.p.window_shape
        cells = []
        for k, m in enumerate(modes):
            a, i, j = m.cell
            if k and K.table_has(self.walk_keys, (a * H + i) * W + j):
                continue  # met by an earlier walk of this frame: the same plateau, the same end
            a2, i2, j2, _, ne = K.walk_plateau(a, i, j, tol_frac, budget, self.p.n_headings, self.fr, self.uv,
                                              self.vals, self.count, self.bnd, self.valid, G, self.acc8,
                                              self.walk_keys, self.walk_vals, self.walk_queue, True)
            self.walk_evals += int(ne)
            cells.append(Mode(float(i2), float(j2), float(a2), 0.0, (int(a2), int(i2), int(j2))))
        return self.climb(G, cells, inv_temp, max_steps=0)

    def refine_hypotheses(self, G, pw, n, inv_temp, *, scale: int, heading_scale: int, heading_reach: int,
                          n_climb: int, heading_radius: int, n_modes: int) -> list:
        """The fast search's refinement on arrays: the best exact pose under each of the ``n`` coarse hypotheses in
        ``pw`` (a :class:`PeakWork` filled by ``nms_profile``), the best ``n_climb`` of those (stable order) climbed
        to local maxima, and the ``n_modes`` best distinct ones as Modes (ranked by exact score, ties to the
        lowest flat index). Only the modes returned are made into Python objects."""
        p = self.p
        A = p.n_headings
        H, W = p.window_shape
        n = min(n, self.kmax)
        ci = self.cells_in[:n]
        ci[:, 0] = pw.a[:n]
        ci[:, 1] = pw.i[:n]
        ci[:, 2] = pw.j[:n]
        K.best_under(ci, heading_scale, scale, heading_reach, A, self.fr, self.uv, self.vals, self.count, self.bnd,
                     self.valid, G, self.acc8, self.cells_out[:n], self.score_out[:n])
        K.order_by_score(self.score_out, self.cells_out, n, W, H * W, False, self.order)
        m = min(n_climb, n)
        K.take_rows(self.cells_out, self.order, m, self.cells_in)
        K.climb_poses(self.cells_in[:m], 16, max(1, heading_radius), A, self.fr, self.uv, self.vals, self.count,
                      self.bnd, self.valid, G, self.cube, self.acc8, self.cells_out[:m], self.nb[:m])
        self.score_out[:m] = self.nb[:m, 0]
        K.order_by_score(self.score_out, self.cells_out, m, W, H * W, True, self.order)
        out = []
        for r in range(m):
            md = self._mode_at(int(self.order[r]), inv_temp)
            if all(not _near(md, o, p) for o in out):
                out.append(md)
                if len(out) == n_modes:
                    break
        return out

    def _mode_at(self, k: int, inv_temp: float) -> Mode:
        """Mode of climb result k (``cells_out[k]``, neighbour scores ``nb[k]``), refined by parabolas."""
        A = self.p.n_headings
        a, i, j = (int(x) for x in self.cells_out[k])
        s0, rm, rp, cm, cp, hm, hp = (float(x) * inv_temp for x in self.nb[k])
        dr, vr = parabola(rm, s0, rp)
        dc, vc = parabola(cm, s0, cp)
        dh, vh = parabola(hm, s0, hp)
        peak = s0 + (vr - s0) + (vc - s0) + (vh - s0)
        return Mode(i + dr, j + dc, float((a + dh) % A), float(peak), (a, i, j), s0)

    def climb(self, G, modes, inv_temp, *, max_steps: int, heading_radius: int = 1) -> list:
        """Climb each mode's cell to a local maximum of the exact score (``max_steps = 0``: stay), then
        refine below a cell and a heading step by parabolas through the neighbours."""
        A = self.p.n_headings
        n = self._load(modes)
        K.climb_poses(self.cells_in[:n], max_steps, max(1, heading_radius), A, self.fr, self.uv, self.vals,
                      self.count, self.bnd, self.valid, G, self.cube, self.acc8, self.cells_out[:n], self.nb[:n])
        return [self._mode_at(k, inv_temp) for k in range(n)]
