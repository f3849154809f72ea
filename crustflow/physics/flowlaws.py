"""Laboratory flow laws, their temperature dependence, and temperature across the crust.

The material side of the channel: which flow law, what temperature, hence what prefactor ``A``
of the channel's simple-shear law ``du/dzeta = A |tau|^(n-1) tau`` or what viscosity (n = 1).
The channel physics that uses them is in :mod:`crustflow.physics.rheology`.

Everything here is a pure function of SI NumPy arrays (Pa, Pa s, s^-1, K, J/mol, m^3/mol, m,
W/m^2, W/(m K), W/m^3) that broadcasts elementwise and never modifies its inputs. Values are
checked (positive temperatures, no temperature above :data:`MAX_TEMPERATURE`), so the functions
are meant for NumPy arrays, not lazy dask arrays. NaN passes through as nodata.

Conventions
-----------
- Laboratory creep laws are fitted to axial tests: ``edot_axial = A_ax sigma^n exp(-(Q + P V)/(R T))``
  with ``sigma`` the differential stress. :class:`FlowLaw` keeps ``A_ax`` as published, with its
  units string, and gives it in SI (Pa^-n s^-1).
- The channel's law is written for simple shear with ``gamma_dot = du/dzeta`` (the engineering
  shear strain rate, twice the tensor component ``edot_xz``) and the shear stress ``tau``:
  ``gamma_dot = A |tau|^(n-1) tau`` with ``A = 3^((n+1)/2) A_ax exp(-(Q + P V)/(R T))``.
- Effective viscosity is ``eta = tau / gamma_dot``, which equals ``tau_II / (2 edot_II)`` in the
  second invariants of deviatoric stress and strain rate (``tau_II = tau``,
  ``edot_II = gamma_dot / 2`` in simple shear).

References
----------
.. [1] Gleason, G. C. & Tullis, J. (1995). A flow law for dislocation creep of quartz aggregates
   determined with the molten salt cell. *Tectonophysics* 247, 1-23.
.. [2] Rybacki, E. & Dresen, G. (2000). Dislocation and diffusion creep of synthetic anorthite
   aggregates. *Journal of Geophysical Research* 105(B11), 26017-26036.
.. [3] Mackwell, S. J., Zimmerman, M. E. & Kohlstedt, D. L. (1998). High-temperature deformation
   of dry diabase with application to tectonics on Venus. *Journal of Geophysical Research*
   103(B1), 975-984.
.. [4] Ranalli, G. (1995). *Rheology of the Earth*, 2nd ed., Chapman & Hall, table 10.3.
.. [5] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., Cambridge University Press,
   section 4-8 (continental geotherms; section number from memory).
.. [6] Tiesinga, E., Mohr, P. J., Newell, D. B. & Taylor, B. N. (2021). CODATA recommended values
   of the fundamental physical constants: 2018. *Reviews of Modern Physics* 93, 025010.
"""

from __future__ import annotations

import difflib
from collections.abc import Callable
from dataclasses import dataclass
from types import MappingProxyType

import numpy as np

from crustflow.errors import CrustflowInputError
from crustflow.physics.temperature import (
    MAX_TEMPERATURE,
    check_temperature,
    steady_geotherm,
    temperature_profile,
)

__all__ = [
    "FLOW_LAWS",
    "GAS_CONSTANT",
    "MAX_TEMPERATURE",
    "FlowLaw",
    "arrhenius_viscosity",
    "axial_to_shear_factor",
    "effective_viscosity",
    "flow_law",
    "linear_temperature_prefactor",
    "newtonian_flow_law",
    "simple_shear_prefactor",
    "steady_geotherm",
    "temperature_profile",
]

#: Molar gas constant R, J/(mol K): CODATA 2018 (Tiesinga et al. 2021, Rev. Mod. Phys. 93, 025010),
#: exact since the 2019 SI (R = N_A k), given here to 15 significant digits.
GAS_CONSTANT = 8.31446261815324

#: Stress units accepted for a published axial prefactor, and one such unit in Pa.
_PREFACTOR_UNITS = MappingProxyType({"MPa^-n s^-1": 1e6, "Pa^-n s^-1": 1.0})
_READ_FROM = ("original", "secondary table")


@dataclass(frozen=True)
class FlowLaw:
    """A laboratory creep law ``edot_axial = A_ax sigma^n exp(-(Q + P V) / (R T))``.

    Attributes
    ----------
    name : str
        Plain-words name, e.g. ``"wet-quartzite"``.
    axial_prefactor : float
        ``A_ax`` as published, in ``axial_prefactor_units``.
    axial_prefactor_units : str
        ``"MPa^-n s^-1"`` or ``"Pa^-n s^-1"``.
    stress_exponent : float
        ``n`` (dimensionless), at least 1.
    activation_energy : float
        ``Q`` (J/mol).
    activation_volume : float
        ``V`` (m^3/mol); default 0.
    reference : str
        The source paper of the values.
    read_from : str
        ``"original"`` (values as the source gives them) or ``"secondary table"`` (read from a
        compilation; confirm against the source before relying on them).
    notes : str
        Anything a user should know (material, water content, doubts).

    Raises
    ------
    CrustflowInputError
        If the exponent is below 1, the prefactor is not positive, the energy or volume negative,
        or a units or ``read_from`` string unknown.

    Notes
    -----
    ``sigma`` is the differential stress of the axial test and ``edot_axial`` its strain rate;
    :func:`simple_shear_prefactor` converts the law to the channel's simple shear. Presets are in
    :data:`FLOW_LAWS`, each with its source ([1]_ compiles many such laws).

    References
    ----------
    .. [1] Ranalli, G. (1995). *Rheology of the Earth*, 2nd ed., Chapman & Hall, chapter 10.
    """

    name: str
    axial_prefactor: float
    axial_prefactor_units: str
    stress_exponent: float
    activation_energy: float
    activation_volume: float = 0.0
    reference: str = ""
    read_from: str = "original"
    notes: str = ""

    def __post_init__(self) -> None:
        if not self.stress_exponent >= 1.0:
            raise CrustflowInputError(
                f"stress exponent of flow law {self.name!r} is {self.stress_exponent}; power-law "
                "creep needs n >= 1 (n = 1 is Newtonian)"
            )
        if not self.axial_prefactor > 0.0:
            raise CrustflowInputError(
                f"axial prefactor of flow law {self.name!r} is {self.axial_prefactor}; give the "
                "positive A of the published law (not its logarithm)"
            )
        if not (self.activation_energy >= 0.0 and self.activation_volume >= 0.0):
            raise CrustflowInputError(
                f"flow law {self.name!r} has a negative activation energy or volume; give Q in "
                "J/mol and V in m^3/mol, both >= 0"
            )
        if self.axial_prefactor_units not in _PREFACTOR_UNITS:
            raise CrustflowInputError(
                f"axial prefactor units {self.axial_prefactor_units!r} of flow law {self.name!r} "
                f"are not known; use one of {', '.join(_PREFACTOR_UNITS)}"
            )
        if self.read_from not in _READ_FROM:
            raise CrustflowInputError(
                f"read_from of flow law {self.name!r} is {self.read_from!r}; use 'original' or "
                "'secondary table'"
            )

    @property
    def axial_prefactor_si(self) -> float:
        """``A_ax`` in SI units, Pa^-n s^-1."""
        pascals = _PREFACTOR_UNITS[self.axial_prefactor_units]
        return self.axial_prefactor * pascals ** (-self.stress_exponent)


#: Flow-law presets by name: the values of SCIENCE.md, prefactors in the units published
#: (MPa^-n s^-1), activation energies in J/mol; no activation volumes (0).
FLOW_LAWS = MappingProxyType(
    {
        law.name: law
        for law in (
            FlowLaw(
                name="wet-quartzite",
                axial_prefactor=1.1e-4,
                axial_prefactor_units="MPa^-n s^-1",
                stress_exponent=4.0,
                activation_energy=223e3,
                reference="Gleason, G. C. & Tullis, J. (1995). Tectonophysics 247, 1-23",
                read_from="secondary table",
                notes="Dislocation creep of quartz aggregates (molten-salt cell), fitted without "
                "a water-fugacity term. Values as tabulated in compilations (SCIENCE.md: 'as "
                "tabulated; confirm'), not checked against the paper's own table.",
            ),
            FlowLaw(
                name="wet-anorthite",
                axial_prefactor=10.0**2.6,
                axial_prefactor_units="MPa^-n s^-1",
                stress_exponent=3.0,
                activation_energy=356e3,
                reference="Rybacki, E. & Dresen, G. (2000). JGR 105(B11), 26017-26036",
                read_from="original",
                notes="Dislocation creep of wet synthetic anorthite aggregates. Values as "
                "SCIENCE.md gives them, citing the paper.",
            ),
            FlowLaw(
                name="dry-diabase",
                axial_prefactor=8.0,
                axial_prefactor_units="MPa^-n s^-1",
                stress_exponent=4.7,
                activation_energy=485e3,
                reference="Mackwell, S. J., Zimmerman, M. E. & Kohlstedt, D. L. (1998). "
                "JGR 103(B1), 975-984",
                read_from="original",
                notes="Dry Maryland diabase. Values as SCIENCE.md gives them, citing the paper.",
            ),
            FlowLaw(
                name="felsic-granulite",
                axial_prefactor=8.0e-3,
                axial_prefactor_units="MPa^-n s^-1",
                stress_exponent=3.1,
                activation_energy=243e3,
                reference="Ranalli, G. (1995). Rheology of the Earth, 2nd ed., table 10.3",
                read_from="secondary table",
                notes="Ranalli's table compiles laboratory data (from memory: Wilks & Carter "
                "1990, Pikwitonei granulite); values as the table gives them.",
            ),
        )
    }
)


def flow_law(name: str) -> FlowLaw:
    """Return the flow-law preset called ``name``.

    Parameters
    ----------
    name : str
        Plain-words name, e.g. ``"wet-quartzite"``; case, spaces and underscores are forgiven.

    Returns
    -------
    FlowLaw
        The preset (see :data:`FLOW_LAWS` for the names and values).

    Raises
    ------
    CrustflowInputError
        If no preset has that name; the message lists the known names.

    Notes
    -----
    The presets and their sources are listed in the module docstring; ``read_from`` says whether
    the values were read from the original paper or from a secondary table.

    References
    ----------
    .. [1] Gleason, G. C. & Tullis, J. (1995). *Tectonophysics* 247, 1-23.
    .. [2] Rybacki, E. & Dresen, G. (2000). *JGR* 105(B11), 26017-26036.
    .. [3] Mackwell, S. J., Zimmerman, M. E. & Kohlstedt, D. L. (1998). *JGR* 103(B1), 975-984.
    .. [4] Ranalli, G. (1995). *Rheology of the Earth*, 2nd ed., Chapman & Hall, table 10.3.
    """
    key = str(name).strip().lower().replace("_", "-").replace(" ", "-")
    if key in FLOW_LAWS:
        return FLOW_LAWS[key]
    close = difflib.get_close_matches(key, FLOW_LAWS, n=1)
    hint = f"; did you mean {close[0]!r}?" if close else ""
    raise CrustflowInputError(
        f"unknown flow law {name!r}; known flow laws: {', '.join(sorted(FLOW_LAWS))}{hint}"
    )


def newtonian_flow_law(
    viscosity: float,
    temperature_K: float,
    activation_energy: float,
    *,
    name: str = "newtonian",
    reference: str = "user-given reference viscosity",
) -> FlowLaw:
    """A linear (n = 1) flow law with viscosity ``viscosity`` at ``temperature_K``.

    Parameters
    ----------
    viscosity : float
        Shear viscosity at the reference temperature (Pa s), positive.
    temperature_K : float
        Reference temperature (K).
    activation_energy : float
        ``Q`` (J/mol); 0 gives a viscosity independent of temperature.
    name, reference : str, optional
        Recorded in the returned law.

    Returns
    -------
    FlowLaw
        With ``stress_exponent = 1`` and ``A_ax = exp(Q / (R T_ref)) / (3 eta_ref)`` in Pa^-1 s^-1.

    Raises
    ------
    CrustflowInputError
        If the viscosity is not positive or the temperature out of range.

    Notes
    -----
    With the conversion of :func:`simple_shear_prefactor`, ``eta(T) = 1 / (3 A_ax exp(-Q/(R T)))
    = eta_ref exp(Q/R (1/T - 1/T_ref))`` (Trouton ratio at n = 1, [1]_).

    References
    ----------
    .. [1] Ranalli, G. (1995). *Rheology of the Earth*, 2nd ed., chapter 4 (from memory).
    """
    check_temperature(temperature_K, "temperature_K")
    if not viscosity > 0.0:
        raise CrustflowInputError(f"viscosity must be positive Pa s, got {viscosity}")
    a_axial = np.exp(activation_energy / (GAS_CONSTANT * temperature_K)) / (3.0 * viscosity)
    return FlowLaw(
        name=name,
        axial_prefactor=float(a_axial),
        axial_prefactor_units="Pa^-n s^-1",
        stress_exponent=1.0,
        activation_energy=activation_energy,
        reference=reference,
        notes=f"eta = {viscosity:g} Pa s at {temperature_K:g} K",
    )


def axial_to_shear_factor(stress_exponent: float) -> float:
    """Factor ``3^((n+1)/2)`` from an axial-test prefactor to the simple-shear prefactor.

    Parameters
    ----------
    stress_exponent : float
        ``n`` (dimensionless).

    Returns
    -------
    float
        ``A / A_ax`` (dimensionless): 3 at n = 1 (Trouton ratio), ``3^2.5`` at n = 4.

    Notes
    -----
    Written with the second invariants ``edot_II = B tau_II^n``. An axial test at differential
    stress ``sigma`` has ``tau_II = sigma / sqrt(3)`` and ``edot_II = (sqrt(3)/2) edot_axial``, so
    ``A_ax = 2 B 3^(-(n+1)/2)``. Simple shear has ``tau_II = tau`` and
    ``edot_II = gamma_dot / 2``, so ``gamma_dot = 2 B tau^n = 3^((n+1)/2) A_ax tau^n`` (value
    derived; the same conversion as [1]_ and [2]_, from memory).

    References
    ----------
    .. [1] Ranalli, G. (1995). *Rheology of the Earth*, 2nd ed., chapter 4 (from memory).
    .. [2] Gerya, T. (2010). *Introduction to Numerical Geodynamic Modelling*, Cambridge
       University Press, chapter 6 (from memory).
    """
    return 3.0 ** ((stress_exponent + 1.0) / 2.0)


def simple_shear_prefactor(
    law: FlowLaw, temperature_K: np.ndarray | float, *, pressure: np.ndarray | float = 0.0
) -> np.ndarray:
    """Prefactor ``A(T)`` of the channel's law ``gamma_dot = A |tau|^(n-1) tau``.

    Parameters
    ----------
    law : FlowLaw
        The laboratory flow law.
    temperature_K : array_like
        Temperature (K), 0 < T <= :data:`MAX_TEMPERATURE`.
    pressure : array_like, optional
        Pressure (Pa) for the activation-volume term; default 0.

    Returns
    -------
    numpy.ndarray
        ``A = 3^((n+1)/2) A_ax exp(-(Q + P V) / (R T))`` in Pa^-n s^-1.

    Raises
    ------
    CrustflowInputError
        If a temperature is not positive or above :data:`MAX_TEMPERATURE`.

    Notes
    -----
    ``gamma_dot = du/dzeta`` is the engineering shear strain rate; see
    :func:`axial_to_shear_factor` for the conversion and ``R`` = :data:`GAS_CONSTANT` ([1]_).

    References
    ----------
    .. [1] Tiesinga, E. et al. (2021). CODATA 2018. *Reviews of Modern Physics* 93, 025010.
    """
    t = check_temperature(temperature_K, "temperature_K")
    exponent = -(law.activation_energy + np.asarray(pressure) * law.activation_volume)
    factor = axial_to_shear_factor(law.stress_exponent) * law.axial_prefactor_si
    return factor * np.exp(exponent / (GAS_CONSTANT * t))


def effective_viscosity(
    law: FlowLaw,
    temperature_K: np.ndarray | float,
    strain_rate: np.ndarray | float,
    *,
    pressure: np.ndarray | float = 0.0,
) -> np.ndarray:
    """Effective viscosity ``tau / gamma_dot`` of a flow law in simple shear.

    Parameters
    ----------
    law : FlowLaw
        The laboratory flow law.
    temperature_K : array_like
        Temperature (K).
    strain_rate : array_like
        Engineering shear strain rate ``gamma_dot = du/dzeta`` (s^-1), >= 0; this is twice the
        tensor component ``edot_xz`` and twice the second invariant ``edot_II``.
    pressure : array_like, optional
        Pressure (Pa) for the activation-volume term; default 0.

    Returns
    -------
    numpy.ndarray
        ``eta = A^(-1/n) gamma_dot^((1-n)/n)`` in Pa s (infinite at zero rate when n > 1).

    Raises
    ------
    CrustflowInputError
        If a strain rate is negative or a temperature out of range.

    Notes
    -----
    From ``gamma_dot = A tau^n``: ``tau = (gamma_dot / A)^(1/n)`` and
    ``eta = tau / gamma_dot``, equal to ``tau_II / (2 edot_II)`` ([1]_, section 4; from memory).

    References
    ----------
    .. [1] Ranalli, G. (1995). *Rheology of the Earth*, 2nd ed., Chapman & Hall.
    """
    rate = np.asarray(strain_rate, dtype=np.float64)
    if np.any(rate < 0.0):
        raise CrustflowInputError(
            "strain_rate has negative values; give the shear strain rate magnitude in s^-1"
        )
    a = simple_shear_prefactor(law, temperature_K, pressure=pressure)
    n = law.stress_exponent
    with np.errstate(divide="ignore"):
        return a ** (-1.0 / n) * rate ** ((1.0 - n) / n)


def arrhenius_viscosity(
    law: FlowLaw, temperature_K: np.ndarray | float, *, pressure: np.ndarray | float = 0.0
) -> np.ndarray:
    """Viscosity ``1 / A(T)`` of a Newtonian (n = 1) flow law.

    Parameters
    ----------
    law : FlowLaw
        A flow law with ``stress_exponent == 1`` (see :func:`newtonian_flow_law`).
    temperature_K : array_like
        Temperature (K).
    pressure : array_like, optional
        Pressure (Pa) for the activation-volume term; default 0.

    Returns
    -------
    numpy.ndarray
        ``eta = 1 / (3 A_ax exp(-(Q + P V) / (R T)))`` in Pa s.

    Raises
    ------
    CrustflowInputError
        If the law is not Newtonian or a temperature is out of range.

    Notes
    -----
    The factor 3 is the Trouton ratio between axial and shear viscosity ([1]_).

    References
    ----------
    .. [1] Ranalli, G. (1995). *Rheology of the Earth*, 2nd ed., chapter 4 (from memory).
    """
    if law.stress_exponent != 1.0:
        raise CrustflowInputError(
            f"arrhenius_viscosity needs a Newtonian law (n = 1) but {law.name!r} has n = "
            f"{law.stress_exponent:g}; use effective_viscosity with a strain rate, or "
            "rheology.power_law_channel"
        )
    return 1.0 / simple_shear_prefactor(law, temperature_K, pressure=pressure)


def linear_temperature_prefactor(
    law: FlowLaw,
) -> Callable[[np.ndarray, np.ndarray, np.ndarray, np.ndarray], np.ndarray]:
    """Prefactor profile ``A(T(zeta))`` for a temperature linear across the channel.

    Parameters
    ----------
    law : FlowLaw
        The flow law.

    Returns
    -------
    callable
        ``f(zeta, thickness, top_K, base_K) -> A`` (Pa^-n s^-1), the simple-shear prefactor at
        the temperature of :func:`temperature_profile`; pass it as ``prefactor_profile`` with
        ``profile_args=(thickness, top_K, base_K)`` and ``prefactor=1.0`` to
        :func:`crustflow.physics.rheology.power_law_channel`.

    Notes
    -----
    The returned function is elementwise and broadcasts; it leaves out the activation-volume
    term (pressure 0), as do the presets ([1]_ for the temperature profile).

    References
    ----------
    .. [1] Turcotte, D. L. & Schubert, G. (2002). *Geodynamics*, 2nd ed., section 4-8.
    """

    def prefactor(zeta, thickness, top_K, base_K):
        return simple_shear_prefactor(law, temperature_profile(zeta, thickness, top_K, base_K))

    prefactor.__doc__ = f"Simple-shear prefactor of {law.name!r} at a linear temperature, SI."
    return prefactor
