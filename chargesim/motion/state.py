"""Particle state: a structure of arrays that grows by doubling.

Rows ``0 .. n-1`` are live storage; the public attributes are views of those
rows. Adding k particles costs O(k) amortised (capacity doubles), memory is
O(N). Dead rows (deposited or escaped particles) are dropped by
:meth:`ParticleState.compact`, which keeps the order of the survivors, so runs
stay bitwise reproducible.
"""
import math

import numba
import numpy as np

# name -> (dtype, trailing shape)
_FIELDS = {
    "id": (np.int64, ()),
    "position": (np.float64, (3,)),
    "velocity": (np.float64, (3,)),
    "diameter": (np.float64, ()),
    "density": (np.float64, ()),
    "eps_p": (np.float64, ()),
    "charge": (np.float64, ()),
    "weight": (np.float64, ()),
    "population": (np.int32, ()),
    "alive": (np.bool_, ()),
}

#: Names of the per-particle arrays, in storage order.
FIELDS = tuple(_FIELDS)


def _column(value, name, n, *, positive=False, nonnegative=False, allow_inf=False):
    arr = np.asarray(value, dtype=np.float64)
    if arr.ndim == 0:
        arr = np.full(n, float(arr))
    if arr.shape != (n,):
        raise ValueError(f"{name} must be a scalar or have shape ({n},), got {arr.shape}")
    bad = np.isnan(arr) if allow_inf else ~np.isfinite(arr)
    if positive:
        bad |= ~(arr > 0)
    if nonnegative:
        bad |= arr < 0
    idx = np.flatnonzero(bad)
    if idx.size:
        need = "> 0" if positive else ">= 0" if nonnegative else "finite"
        raise ValueError(f"{name} must be {need}; index {int(idx[0])} is {arr[idx[0]]!r}")
    return arr


def _points(value, name, n=None):
    arr = np.asarray(value, dtype=np.float64)
    if arr.ndim == 1 and arr.size == 3 and n is not None:
        arr = np.broadcast_to(arr, (n, 3))
    if arr.ndim == 0 and n is not None:
        arr = np.full((n, 3), float(arr))
    if arr.ndim != 2 or arr.shape[1] != 3 or (n is not None and arr.shape[0] != n):
        raise ValueError(f"{name} must have shape ({'N' if n is None else n}, 3), got {arr.shape}")
    bad = np.flatnonzero(~np.isfinite(arr).all(axis=1))
    if bad.size:
        raise ValueError(f"{name} holds a non-finite value at index {int(bad[0])}")
    return arr


def sphere_mass(diameter, density):
    """Mass of spheres, kg: (pi/6) d^3 rho, in this order of operations (the
    run's masses, whole state or some rows, are the same bits)."""
    return (math.pi / 6.0) * diameter * diameter * diameter * density


@numba.njit(cache=True)
def _drop_rows(flat, k, dead, n):
    """Drop rows ``dead`` (sorted indices) of the first n rows of ``flat``
    (rows of k values), moving the later rows up in order, in place.

    Rows before the first dead one stay where they are, and runs of live
    rows are moved without testing each row: measured on the 2-core
    reference machine (the other core busy) at N = 1e5 with 50 dead rows,
    the ten columns took 2.5 ms against 5.8 ms for a pass testing each
    row's alive flag."""
    w = dead[0] * k
    for j in range(dead.size):
        end = (dead[j + 1] if j + 1 < dead.size else n) * k
        for e in range((dead[j] + 1) * k, end):
            flat[w] = flat[e]
            w += 1


class ParticleState:
    """Per-particle arrays of the simulated particles.

    Parameters
    ----------
    capacity : int
        Rows reserved at first, >= 1 (the arrays grow by doubling).

    Notes
    -----
    One simulated particle stands for ``weight`` real ones: space charge uses
    ``weight * charge``; drag, mobility and deposits use the real particle
    (``diameter``, ``density``, ``charge`` are those of one real particle).
    """

    def __init__(self, capacity=64):
        capacity = int(capacity)
        if capacity < 1:
            raise ValueError(f"capacity must be >= 1, got {capacity}")
        self._n = 0
        self.next_id = 0
        self._data = {k: np.zeros((capacity,) + shp, dtype=dt) for k, (dt, shp) in _FIELDS.items()}

    # -- sizes ---------------------------------------------------------------
    @property
    def n(self):
        """Number of rows in use (live and not yet compacted dead ones)."""
        return self._n

    def __len__(self):
        return self._n

    @property
    def capacity(self):
        """Rows allocated."""
        return self._data["id"].shape[0]

    def reserve(self, total):
        """Make room for ``total`` rows (doubling), keeping the contents."""
        cap = self.capacity
        if total <= cap:
            return
        while cap < total:
            cap *= 2
        for k, arr in self._data.items():
            new = np.zeros((cap,) + arr.shape[1:], dtype=arr.dtype)
            new[: self._n] = arr[: self._n]
            self._data[k] = new

    # -- views ---------------------------------------------------------------
    def __getattr__(self, name):
        # only called for names not found normally: the per-particle views
        d = self.__dict__
        if name in _FIELDS and "_data" in d:  # (absent while unpickling)
            return d["_data"][name][: d["_n"]]
        raise AttributeError(f"'ParticleState' object has no attribute {name!r}")

    @property
    def radius(self):
        """Particle radius, m."""
        return 0.5 * self.diameter

    @property
    def mass(self):
        """Mass of one real particle, kg (sphere of the given density)."""
        return sphere_mass(self.diameter, self.density)

    # -- changes ---------------------------------------------------------------
    def add(self, position, velocity=0.0, *, diameter, density, eps_p=np.inf, charge=0.0, weight=1.0,
            population=0):
        """Append particles and return their new ids.

        Parameters
        ----------
        position : array_like, shape (k, 3)
            Positions, m.
        velocity : array_like, shape (k, 3) or (3,) or scalar
            Velocities, m/s.
        diameter : float or array_like (k,)
            Diameters, m (> 0).
        density : float or array_like (k,)
            Material densities, kg/m^3 (> 0).
        eps_p : float or array_like (k,)
            Particle relative permittivity (>= 1; inf for a conductor).
        charge : float or array_like (k,)
            Charge of one real particle, C.
        weight : float or array_like (k,)
            Real particles per simulated particle (> 0).
        population : int or array_like (k,)
            Population index (>= 0).

        Returns
        -------
        ndarray of int64, shape (k,)
            The ids given to the new particles (consecutive, never reused).
        """
        pos = _points(position, "position")
        k = pos.shape[0]
        vel = _points(velocity, "velocity", k)
        cols = {
            "diameter": _column(diameter, "diameter", k, positive=True),
            "density": _column(density, "density", k, positive=True),
            "eps_p": _column(eps_p, "eps_p", k, allow_inf=True),
            "charge": _column(charge, "charge", k),
            "weight": _column(weight, "weight", k, positive=True),
        }
        bad = np.flatnonzero(cols["eps_p"] < 1.0)
        if bad.size:
            raise ValueError(f"eps_p must be >= 1 (inf for a conductor); index {int(bad[0])} is {cols['eps_p'][bad[0]]!r}")
        pop = np.asarray(population)
        if pop.ndim == 0:
            pop = np.full(k, int(pop))
        if pop.shape != (k,) or (k and pop.min() < 0):
            raise ValueError(f"population must be a non-negative int or shape ({k},)")
        lo = self._n
        self.reserve(lo + k)
        d = self._data
        ids = np.arange(self.next_id, self.next_id + k, dtype=np.int64)
        d["id"][lo:lo + k] = ids
        d["position"][lo:lo + k] = pos
        d["velocity"][lo:lo + k] = vel
        for name, col in cols.items():
            d[name][lo:lo + k] = col
        d["population"][lo:lo + k] = pop
        d["alive"][lo:lo + k] = True
        self._n = lo + k
        self.next_id += k
        return ids

    def compact(self, extra=()):
        """Drop dead rows, keeping the order of the live ones.

        Parameters
        ----------
        extra : sequence of ndarray
            Further per-row arrays (length ``n``) to filter alike: in place
            (a copy first if not C-contiguous and writeable), returned as views
            of their first rows.

        Returns
        -------
        list of ndarray
            The filtered ``extra`` arrays.
        """
        n = self._n
        dead = np.flatnonzero(~self.alive)
        if dead.size == 0:
            return list(extra)
        for arr in self._data.values():
            _drop_rows(arr.reshape(-1), arr.size // arr.shape[0], dead, n)
        self._n = keep = n - dead.size
        out = []
        for e in extra:
            if not (e.flags.c_contiguous and e.flags.writeable):
                e = e.copy()
            # (masked copies of the run loop's codes and f0: 2.4 ms at N = 1e5, in place 0.6 ms)
            _drop_rows(e.reshape(-1), e.size // n, dead, n)
            out.append(e[:keep])
        return out

    # -- copies and checkpoints ----------------------------------------------
    def copy(self):
        """An independent copy (live rows only)."""
        return ParticleState.from_dict(self.to_dict())

    def to_dict(self):
        """Dict of arrays (copies of the live rows) plus ``next_id``."""
        d = {k: np.array(v[: self._n], copy=True) for k, v in self._data.items()}
        d["next_id"] = np.int64(self.next_id)
        return d

    @classmethod
    def from_dict(cls, d):
        """Rebuild a state written by :meth:`to_dict`."""
        missing = [k for k in FIELDS if k not in d]
        if missing:
            raise ValueError(f"state dict lacks {missing}")
        n = int(np.asarray(d["id"]).shape[0])
        s = cls(max(n, 1))
        for k, (dt, shp) in _FIELDS.items():
            arr = np.asarray(d[k], dtype=dt)
            if arr.shape != (n,) + shp:
                raise ValueError(f"state dict entry {k!r} has shape {arr.shape}, expected {(n,) + shp}")
            s._data[k][:n] = arr
        s._n = n
        s.next_id = int(d.get("next_id", (int(s._data["id"][:n].max()) + 1) if n else 0))
        return s
