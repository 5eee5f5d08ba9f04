"""Invented dust fields and simulated tracer catalogues.

Used by the demo data generator, the tests and the benchmarks. A field is a smooth
exponential layer plus discrete clouds; its true cumulative A_V is known exactly, so a
model built from tracers drawn from it can be scored against the truth.
"""

from dataclasses import dataclass, field as dc_field

import numpy as np
from astropy.table import Table
from scipy.special import ndtr

from ._lib.sky import separation_deg
from .layer import layer_av_pc

__all__ = ["Cloud", "DustField", "ClumpyField", "simulate_tracers", "random_clouds"]


@dataclass(frozen=True)
class Cloud:
    """A discrete dust cloud.

    Parameters
    ----------
    l, b : float
        Centre, Galactic degrees.
    distance : float
        Distance of the cloud's centre (pc).
    radius : float
        Angular Gaussian sigma of its column on the sky (deg).
    depth : float
        Gaussian sigma of its extent along the sight line (pc).
    av : float
        A_V through its centre (mag).
    """

    l: float
    b: float
    distance: float
    radius: float
    depth: float
    av: float


@dataclass(frozen=True)
class DustField:
    """An exponential layer (a0 mag/kpc, h pc, z_sun pc) plus clouds, with exact A_V."""

    a0: float = 1.0
    h: float = 120.0
    z_sun: float = 20.0
    clouds: tuple = dc_field(default_factory=tuple)

    def av(self, l, b, distance):
        """True cumulative A_V (mag) toward (l, b) [deg] out to ``distance`` [pc]."""
        l = np.asarray(l, float)
        b = np.asarray(b, float)
        d = np.asarray(distance, float)
        total = layer_av_pc(b, d, self.a0, self.h, self.z_sun)
        for c in self.clouds:  # a handful of clouds, each vectorised over all positions
            sep = separation_deg(l, b, c.l, c.b)
            total = total + c.av * np.exp(-0.5 * (sep / c.radius) ** 2) * ndtr((d - c.distance) / c.depth)
        return total

    def layer_av(self, b, distance):
        """A_V (mag) of the layer alone."""
        return layer_av_pc(np.asarray(b, float), np.asarray(distance, float), self.a0, self.h, self.z_sun)


def random_clouds(n, l_range, b_range, distance_range, rng, av_range=(0.3, 2.0), radius_range=(1.0, 4.0), depth=30.0):
    """Draw ``n`` invented clouds uniformly inside a region (for tests and demos)."""
    rng = np.random.default_rng(rng)
    return tuple(
        Cloud(
            l=float(rng.uniform(*l_range)) % 360.0,
            b=float(rng.uniform(*b_range)),
            distance=float(rng.uniform(*distance_range)),
            radius=float(rng.uniform(*radius_range)),
            depth=float(depth),
            av=float(rng.uniform(*av_range)),
        )
        for _ in range(n)
    )


def simulate_tracers(
    dust,
    n,
    *,
    l_range=(0.0, 360.0),
    b_range=(-90.0, 90.0),
    distance_max=5000.0,
    distance_min=50.0,
    scale_height=80.0,
    distance_frac_err=(0.08, 0.15),
    ebv_err=(0.02, 0.05),
    rv=3.1,
    name_prefix="Sim",
    rng=None,
):
    """Draw a catalogue of tracers from a dust field, with realistic errors.

    Tracers sit in a thin disc (exponential in height with ``scale_height`` pc, uniform in
    surface density out to ``distance_max`` pc in the plane) inside the given l, b ranges.
    Observed distances scatter log-normally by a fraction drawn from ``distance_frac_err``;
    observed E(B-V) scatters normally by an error drawn from ``ebv_err`` (mag).

    Returns
    -------
    astropy.table.Table
        Columns ``name``, ``l``, ``b`` (deg), ``distance``, ``distance_err`` (pc), ``ebv``,
        ``ebv_err`` (mag), and the truth: ``true_distance`` (pc), ``true_av`` (mag).
    """
    import astropy.units as u

    rng = np.random.default_rng(rng)
    l_lo, l_hi = l_range
    width = (l_hi - l_lo) % 360.0 or 360.0
    out_l, out_b, out_d = [], [], []
    have = 0
    while have < n:  # rejection sampling in batches (vectorised per batch)
        m = 4 * (n - have) + 100
        rho = distance_max * np.sqrt(rng.uniform((distance_min / distance_max) ** 2, 1.0, m))
        z = rng.laplace(0.0, scale_height, m) - dust.z_sun
        l = (l_lo + rng.uniform(0, width, m)) % 360.0
        b = np.rad2deg(np.arctan2(z, rho))
        d = np.hypot(rho, z)
        ok = (b >= b_range[0]) & (b <= b_range[1]) & (d <= distance_max) & (d >= distance_min)
        out_l.append(l[ok]); out_b.append(b[ok]); out_d.append(d[ok])
        have += int(ok.sum())
    l = np.concatenate(out_l)[:n]
    b = np.concatenate(out_b)[:n]
    d_true = np.concatenate(out_d)[:n]
    av_true = dust.av(l, b, d_true)
    fe = rng.uniform(*distance_frac_err, n)
    d_obs = d_true * np.exp(rng.normal(0, fe))
    ee = rng.uniform(*ebv_err, n)
    ebv_obs = av_true / rv + rng.normal(0, ee)
    width_digits = len(str(n))
    names = np.array([f"{name_prefix} {i + 1:0{width_digits}d}" for i in range(n)])
    t = Table()
    t["name"] = names
    t["l"] = l * u.deg
    t["b"] = b * u.deg
    t["distance"] = d_obs * u.pc
    t["distance_err"] = fe * d_obs * u.pc
    t["ebv"] = ebv_obs * u.mag
    t["ebv_err"] = ee * u.mag
    t["true_distance"] = d_true * u.pc
    t["true_av"] = av_true * u.mag
    t.meta["rv"] = rv
    return t


class ClumpyField:
    """An exponential layer with log-normal small-scale structure, plus clouds (invented, for tests).

    The density is ``a0 exp(-|z| / h) exp(sigma g - sigma^2 / 2)`` with ``g`` a unit-variance
    Gaussian random field of Gaussian correlation length ``corr_length`` (pc), drawn on a
    Cartesian grid of ``cell`` pc around the Sun (``extent`` pc in x and y, ``height`` pc in
    z; outside it the layer is smooth), plus the clouds of :class:`DustField`. Cumulative
    A_V is integrated numerically along each sight line in steps of ``cell / 2``.
    """

    def __init__(self, a0=1.0, h=120.0, z_sun=20.0, sigma=1.0, corr_length=40.0, clouds=(),
                 extent=4500.0, height=400.0, cell=25.0, seed=0):
        self.a0, self.h, self.z_sun = float(a0), float(h), float(z_sun)
        self.sigma, self.corr_length, self.cell = float(sigma), float(corr_length), float(cell)
        self.clouds = tuple(clouds)
        self.extent, self.height = float(extent), float(height)
        rng = np.random.default_rng(seed)
        nxy = int(np.ceil(2 * extent / cell)) + 1
        nz = int(np.ceil(2 * height / cell)) + 1
        white = rng.standard_normal((nxy, nxy, nz))
        kx = np.fft.fftfreq(nxy, d=cell) * 2 * np.pi
        kz = np.fft.fftfreq(nz, d=cell) * 2 * np.pi
        k2 = kx[:, None, None] ** 2 + kx[None, :, None] ** 2 + kz[None, None, :] ** 2
        amp = np.exp(-0.25 * k2 * corr_length**2)  # square root of a Gaussian power spectrum
        g = np.fft.ifftn(np.fft.fftn(white) * amp).real
        g /= g.std()
        self._g = g.astype(np.float32)
        self._origin = np.array([-extent, -extent, -height])

    def _density(self, x, y, z):
        from scipy.ndimage import map_coordinates

        zg = z  # heights relative to the mid-plane
        idx = np.vstack([(x - self._origin[0]) / self.cell, (y - self._origin[1]) / self.cell,
                         (zg - self._origin[2]) / self.cell])
        g = map_coordinates(self._g, idx, order=1, mode="constant", cval=0.0)
        inside = (np.abs(x) <= self.extent) & (np.abs(y) <= self.extent) & (np.abs(zg) <= self.height)
        clump = np.where(inside, np.exp(self.sigma * g - 0.5 * self.sigma**2), 1.0)
        return self.a0 / 1000.0 * np.exp(-np.abs(zg) / self.h) * clump

    def av(self, l, b, distance):
        """True cumulative A_V (mag) toward (l, b) [deg] out to ``distance`` [pc]."""
        l, b, d = np.broadcast_arrays(*(np.asarray(x, float) for x in (l, b, distance)))
        shape = l.shape
        l, b, d = l.ravel(), b.ravel(), d.ravel()
        out = np.empty(l.size)
        step = self.cell / 2
        for s in range(0, l.size, 2000):  # blocks of sight lines, each integrated by the midpoint rule
            lb, bb, db = l[s:s + 2000], b[s:s + 2000], d[s:s + 2000]
            n_steps = int(np.ceil(db.max() / step)) if db.size else 0
            frac = (np.arange(n_steps) + 0.5) / max(n_steps, 1)
            r = db[:, None] * frac[None, :]
            lr, br = np.deg2rad(lb)[:, None], np.deg2rad(bb)[:, None]
            x, y = r * np.cos(br) * np.cos(lr), r * np.cos(br) * np.sin(lr)
            z = self.z_sun + r * np.sin(br)
            rho = self._density(x.ravel(), y.ravel(), z.ravel()).reshape(r.shape)
            out[s:s + 2000] = rho.sum(axis=1) * db / max(n_steps, 1)
        for c in self.clouds:
            sep = separation_deg(l, b, c.l, c.b)
            out = out + c.av * np.exp(-0.5 * (sep / c.radius) ** 2) * ndtr((d - c.distance) / c.depth)
        return out.reshape(shape)

    def layer_av(self, b, distance):
        """A_V (mag) of the smooth layer alone."""
        return layer_av_pc(np.asarray(b, float), np.asarray(distance, float), self.a0, self.h, self.z_sun)
