"""The fast path of ensembles: base maps and per-member scalars.

For a Newtonian channel of uniform parameters every output is a combination of a few base maps with
per-member scalars (:func:`fast_fields`), so each member costs a few multiply-adds per cell;
:func:`fast_path_obstacle` tells where this does not apply. Part of :mod:`crustflow.analyses.ensemble.run`,
which re-exports the public names; conventions there.

References
----------
.. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., Cambridge University Press,
   sections 2.2 and 6.2.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from crustflow.engine.fields import crust_thickness_of
from crustflow.geometry.grid import divergence, gradient
from crustflow.physics.channel import ChannelSolution, channel_flow
from crustflow.scenario.ensemble_spec import EnsembleSpec

# ----------------------------------------------------------------------------------------------
# the fast path: base maps and per-member scalars


@dataclass(frozen=True)
class MemberScalars:
    """Per-member scalars of the fast path, arrays over members (SI)."""

    h: np.ndarray
    eta: np.ndarray
    ue: np.ndarray
    un: np.ndarray
    rho_c: np.ndarray
    rho_ch: np.ndarray
    rho_w: np.ndarray
    rho_m: np.ndarray
    g: np.ndarray
    t0: np.ndarray
    a: np.ndarray
    b: np.ndarray
    airy: bool

    @classmethod
    def of(cls, members, airy: bool) -> MemberScalars:
        def get(name):  # None (a parameter the rheology does not use) becomes NaN
            return np.array([getattr(p, name) for p in members], dtype=float)

        return cls.of_values(get, airy)

    @classmethod
    def of_values(cls, get, airy: bool) -> MemberScalars:
        """Scalars from ``get(field)``: the values of a ModelParameters field over the members."""
        rho_c, rho_m, rho_w = get("rho_crust"), get("rho_mantle"), get("rho_water")
        zero = np.zeros_like(rho_c)
        if airy:  # Airy: T = T0 + a H on land, T0 + b H under water (load.crust_thickness_airy)
            t0, a, b = (
                get("reference_thickness"),
                rho_m / (rho_m - rho_c),
                (rho_m - rho_w) / (rho_m - rho_c),
            )
        else:
            t0, a, b = zero, zero, zero
        return cls(
            get("channel_thickness"),
            get("viscosity"),
            get("wall_east"),
            get("wall_north"),
            rho_c,
            get("rho_channel"),
            rho_w,
            rho_m,
            get("gravity"),
            t0,
            a,
            b,
            airy,
        )

    @property
    def vectors(self) -> tuple[str, ...]:
        """Base gradient maps: of the thickness grid (not in the Airy case), of H+ and of H-."""
        return ("Hp", "Hm") if self.airy else ("Tg", "Hp", "Hm")

    @property
    def gamma(self) -> list[np.ndarray]:
        """Coefficients of the base gradients in G, Pa/m per (m/m), one per :attr:`vectors`."""
        d = self.rho_c - self.rho_ch
        gp = self.g * (d * self.a + self.rho_ch)
        gm = self.g * (d * self.b + self.rho_ch - self.rho_w)
        return [gp, gm] if self.airy else [self.g * d, gp, gm]


def _terms(name: str, s: MemberScalars) -> list[tuple[str, np.ndarray]]:
    """(base map, per-member coefficient) pairs whose sum is variable ``name`` (SI)."""
    k = -(s.h**3) / (12.0 * s.eta)
    w_e, w_n = 0.5 * s.h * s.ue, 0.5 * s.h * s.un
    vec, gam = s.vectors, s.gamma
    tg = np.zeros_like(s.h) if s.airy else np.ones_like(s.h)
    if name in ("flux_east", "flux_north"):
        side = name.split("_")[1]
        return [("one", w_e if side == "east" else w_n)] + [
            (f"{v}_{side}", k * gm) for v, gm in zip(vec, gam, strict=True)
        ]
    if name in ("drive_east", "drive_north"):
        side = name.split("_")[1]
        return [(f"{v}_{side}", gm) for v, gm in zip(vec, gam, strict=True)]
    if name == "thickening_rate":
        return [("E", -w_e), ("N", -w_n)] + [
            (f"D_{v}", -k * gm) for v, gm in zip(vec, gam, strict=True)
        ]
    if name == "uplift_rate":
        land = 1.0 - s.rho_ch / s.rho_m
        sea = (s.rho_m - s.rho_ch) / (s.rho_m - s.rho_w)
        thick = _terms("thickening_rate", s)
        return [(f"{c}_land", v * land) for c, v in thick] + [
            (f"{c}_sea", v * sea) for c, v in thick
        ]
    if name == "crust_thickness":
        return [("one", s.t0), ("Tg", tg), ("Hp", s.a), ("Hm", s.b)]
    if name == "channel_top_depth":
        return [("one", s.t0 - s.h), ("Tg", tg), ("Hp", s.a - 1.0), ("Hm", s.b - 1.0)]
    if name == "overburden_pressure":
        gc = s.g * s.rho_c
        return [
            ("one", gc * (s.t0 - s.h)),
            ("Tg", gc * tg),
            ("Hp", gc * s.a),
            ("Hm", s.g * (s.rho_c * s.b - s.rho_w)),
        ]
    if name == "channel_thickness":
        return [("one", s.h)]
    raise KeyError(name)


#: Variables that are sums of base maps times member scalars.
LINEAR = (
    "flux_east",
    "flux_north",
    "drive_east",
    "drive_north",
    "thickening_rate",
    "uplift_rate",
    "crust_thickness",
    "channel_top_depth",
    "overburden_pressure",
    "channel_thickness",
)
#: Variables of the one-cell solution computed by crustflow.physics.channel.channel_flow.
SOLUTION = tuple(
    f.name for f in dataclasses.fields(ChannelSolution) if not f.name.startswith("flux_")
)
#: Everything the fast path computes; other variables need the fallback.
FAST_VARIABLES = LINEAR + SOLUTION + ("flux_magnitude",)
#: Variables defined wherever the inputs are (the rest also need a finite driving gradient).
ON_VALID_FIELDS = (
    "crust_thickness",
    "channel_top_depth",
    "overburden_pressure",
    "channel_thickness",
)


def block_basis(H: np.ndarray, T: np.ndarray | None, geom) -> dict[str, np.ndarray]:
    """Base maps of one block of rows (a grid, or a strip with halo rows), SI.

    ``T`` is the crustal thickness grid (None in the Airy case). Returns the masks ``valid`` and
    ``live`` (as :func:`crustflow.engine.fields.fields_si` defines them) and the maps named in
    :func:`_terms`: ``one``, ``Tg``, ``Hp = max(H, 0)``, ``Hm = min(H, 0)``, their gradients
    ``<v>_east``/``<v>_north``, the divergences ``D_<v>`` of those gradient fields and ``E``/``N``
    of unit east/north fields, and ``land`` (1 where H >= 0). NaN where not valid/live.
    """
    airy = T is None
    valid = np.isfinite(H) if airy else np.isfinite(H) & np.isfinite(T)
    out = {"valid": valid, "land": (H >= 0).astype(float)}
    out["Hp"] = np.where(valid, np.maximum(H, 0.0), np.nan)
    out["Hm"] = np.where(valid, np.minimum(H, 0.0), np.nan)
    out["Tg"] = np.where(valid, 0.0 if airy else T, np.nan)
    out["one"] = np.where(valid, 1.0, np.nan)
    vectors = ("Hp", "Hm") if airy else ("Tg", "Hp", "Hm")
    live = valid.copy()
    for v in vectors:
        out[f"{v}_east"], out[f"{v}_north"] = gradient(out[v], geom)
        live &= np.isfinite(out[f"{v}_east"]) & np.isfinite(out[f"{v}_north"])
    for v in vectors:  # gradients of fields sharing one nodata pattern share theirs
        out[f"D_{v}"] = divergence(out[f"{v}_east"], out[f"{v}_north"], geom)
    unit, zero = np.where(live, 1.0, np.nan), np.where(live, 0.0, np.nan)
    out["E"] = divergence(unit, zero, geom)
    out["N"] = divergence(zero, unit, geom)
    out["live"] = live
    return out


class MemberBuffers:
    """Named (cells, members) work arrays, allocated once and reused: fresh arrays of this size cost
    more in page faults than the arithmetic done on them."""

    def __init__(self, members: int) -> None:
        self.members, self._arrays = members, {}

    def get(self, name: str, cells: int, dtype=np.float64) -> np.ndarray:
        arr = self._arrays.get(name)
        if arr is None or arr.shape[0] < cells:
            arr = self._arrays[name] = np.empty((cells, self.members), dtype=dtype)
        return arr[:cells]


class MemberChunk:
    """Member values of a chunk of cells on the fast path, as (cells, members) float64 arrays."""

    def __init__(self, columns: dict, scalars: MemberScalars, buffers: MemberBuffers) -> None:
        self.columns, self.s, self.buf = columns, scalars, buffers
        self.cells = columns["valid"].size
        self._cache: dict[str, np.ndarray] = {}

    def _column(self, name: str) -> np.ndarray:
        col = self.columns.get(name)
        if col is None:
            base, _, side = name.rpartition("_")
            land = self.columns["land"]
            col = self.columns[base] * (land if side == "land" else 1.0 - land)
            self.columns[name] = col
        return col

    def _linear(self, name: str, slot: str) -> np.ndarray:
        terms = _terms(name, self.s)
        basis = self.columns.get(f"stack:{name}")  # kept with the columns: a fit reuses them
        if basis is None:
            basis = np.stack([np.nan_to_num(self._column(c), nan=0.0) for c, _ in terms], axis=1)
            self.columns[f"stack:{name}"] = basis
        coef = np.stack([np.broadcast_to(v, (self.buf.members,)) for _, v in terms])
        return np.matmul(basis, coef, out=self.buf.get(slot, self.cells))

    def values(self, name: str) -> np.ndarray:
        """Member values of ``name`` (SI), NaN on rows (cells) where it is nodata."""
        if name in self._cache:
            return self._cache[name]
        keep = name in ("flux_east", "flux_north", "drive_east", "drive_north")
        if name in LINEAR:
            vals = self._linear(name, name if keep else "work")
        elif name == "flux_magnitude":
            qe, qn = self.values("flux_east"), self.values("flux_north")
            vals = np.multiply(qe, qe, out=self.buf.get("work", self.cells))
            tmp = np.multiply(qn, qn, out=self.buf.get("tmp", self.cells))
            np.sqrt(np.add(vals, tmp, out=vals), out=vals)
        elif name in SOLUTION:
            vals = self._solution()[name]
        else:
            raise KeyError(f"the fast path does not compute {name}")
        rows = self.columns["valid" if name in ON_VALID_FIELDS else "live"]
        vals[~rows] = np.nan
        if keep:
            self._cache[name] = vals
        return vals

    def _solution(self) -> dict:
        if "solution" not in self._cache:
            s = self.s
            sol = channel_flow(
                self.values("drive_east"),
                self.values("drive_north"),
                s.h[None],
                s.eta[None],
                wall_east=s.ue[None],
                wall_north=s.un[None],
            )
            out = {k: np.asarray(v, dtype=float) for k, v in sol.as_dict().items()}
            self._cache["solution"] = out
        return self._cache["solution"]


def fast_fields(
    elevation, geometry, members, *, crust_thickness=None, moho_depth=None, wanted=None
) -> dict[str, np.ndarray]:
    """Output variables of many members at once on one block of cells, by the fast path.

    Parameters
    ----------
    elevation : ndarray
        H, m, NaN for nodata, on ``geometry``'s cells.
    geometry : crustflow.geometry.grid.GridGeometry
    members : sequence of ModelParameters
        SI; each a Newtonian channel of uniform parameters.
    crust_thickness, moho_depth : ndarray, optional
        At most one, m; with neither, Airy isostasy from each member's ``reference_thickness``.
    wanted : iterable of str, optional
        Variables (default: the flux, drive, load, thickening and uplift variables).

    Returns
    -------
    dict
        Name -> array (members, nrow, ncol) in SI, equal to :func:`crustflow.engine.fields.fields_si` per
        member to rounding.

    Notes
    -----
    With ``W = max(0, -H) = -H-``, ``H = H+ + H-``, ``z_top = T - H - h`` and
    ``P_top = g (rho_w W + rho_c (T - h))`` (crustflow.physics.isostasy), the drive
    ``G = grad(P_top) - rho_ch g grad(z_top)`` becomes, for uniform h and densities,

    ``G = g [(rho_c - rho_ch) grad(T) + rho_ch grad(H+) + (rho_ch - rho_w) grad(H-)]``.

    With a thickness grid, ``grad(T)`` is one base map; in the Airy case
    ``T = T0 + a H+ + b H-`` (``a = rho_m / (rho_m - rho_c)``, ``b = (rho_m - rho_w) / (rho_m - rho_c)``),
    so ``grad(T) = a grad(H+) + b grad(H-)``. Either way G is a sum of two or three base gradient
    maps times per-member scalars. Then ``q = U h / 2 - h^3 G / (12 eta)`` adds a uniform field,
    and the finite-volume divergence (linear, with one nodata pattern for every member) gives
    ``-dT/dt = (h U_e / 2) div(e) + (h U_n / 2) div(n) + sum_k c_k div(B_k)`` from the divergences of
    the base maps ``B_k`` and of unit east and north fields ``e``, ``n`` (not zero on geographic
    grids: meridians converge). The uplift rate multiplies by the land or sea factor of
    :func:`crustflow.physics.isostasy.uplift_rate`. The magnitude and the one-cell solution (peak speed,
    drags, backflow) are computed from q and G member by member, cell by cell.

    References
    ----------
    Turcotte, D. L. & Schubert, G. (2002), Geodynamics, 2nd ed., sections 2.2 and 6.2.
    """
    members = list(members)
    H = np.asarray(elevation, dtype=float)
    airy = crust_thickness is None and moho_depth is None
    T = (
        None
        if airy
        else crust_thickness_of(
            H, members[0], crust_thickness=crust_thickness, moho_depth=moho_depth
        )
    )
    names = list(
        wanted
        or (
            "flux_east",
            "flux_north",
            "flux_magnitude",
            "drive_east",
            "drive_north",
            "thickening_rate",
            "uplift_rate",
            "crust_thickness",
            "channel_top_depth",
            "overburden_pressure",
        )
    )
    basis = block_basis(H, T, geometry)
    cells = np.flatnonzero(basis["valid"])
    chunk = MemberChunk(
        {k: v.ravel()[cells] for k, v in basis.items()},
        MemberScalars.of(members, airy),
        MemberBuffers(len(members)),
    )
    out = {}
    for name in names:
        full = np.full((len(members), H.size), np.nan)
        full[:, cells] = chunk.values(name).T
        out[name] = full.reshape((len(members), *H.shape))
    return out


def fast_path_obstacle(scenario, spec: EnsembleSpec) -> str | None:
    """Why the fast path does not apply to this scenario and ensemble, or None when it does."""
    channel = getattr(scenario, "channel", None)
    if channel is not None and getattr(channel, "rheology", "newtonian") != "newtonian":
        return f"the channel is {channel.rheology}, not Newtonian"
    if channel is not None and getattr(channel, "grids", None):
        return f"channel parameters are grids ({', '.join(channel.grids)})"
    load_model = getattr(scenario, "load", None)
    if load_model is not None and load_model != type(load_model)():
        return "the load model is not a uniform crust with the channel at its base"
    needed = set(spec.variables) | {spec.exceedance_variable} - {None}
    other = sorted(needed - set(FAST_VARIABLES))
    if other:
        return f"the fast path does not compute {', '.join(other)}"
    return None
