"""Satellite geometry at a reception epoch: transmit time, Sagnac-rotated position, clock, az/el.

Axes: ``m`` requested satellites, in request order; rows without a usable ephemeris are NaN with
``valid`` False (STYLE rule 21: masked, never branched on per satellite).

Transmit time: from the pseudorange when one is given (t_tx = t_rx − P/c − dt_sv, IS-GPS-200
§20.3.3.3.3.1), otherwise by light-time iteration on the geometric range. The orbit is evaluated
once per epoch (interpolated on the selection's 30 s grid of exact states, see ``_nodes``), at a
first guess t0 of the transmit time, and moved to the final t_tx along its velocity: |t_tx − t0|
is at most a few ms, where the neglected acceleration term is below 0.1 mm. The position is then
expressed in the ECEF frame of reception (Earth rotation during the flight).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from ._constants import C_MPS, OMEGA_E_GPS_RADPS
from ._ephstore import EphemerisSelection, EphemerisStore
from ._frames import ecef_to_geodetic, enu_basis
from ._glonass import glonass_state
from ._kepler import kepler_state

__all__ = ["NOMINAL_FLIGHT_TIME_S", "SatelliteGeometry", "satellite_geometry"]

F64 = npt.NDArray[np.float64]
#: First guess of the signal flight time (s): ~22,000 km MEO range.
NOMINAL_FLIGHT_TIME_S = 0.075
#: Transmit times further than this from t_rx − 75 ms (implausible pseudoranges) are evaluated
#: directly instead of interpolated between grid nodes (s).
_MAX_INTERPOLATION_OFFSET_S = 1.0
#: Pseudoranges outside this span (m) are ignored (light time from the geometry instead): MEO
#: to GEO ranges are 19,000–42,000 km, and receiver clock offsets add up to a few hundred km.
_PSEUDORANGE_MIN_M = 1.5e7
_PSEUDORANGE_MAX_M = 5.0e7


@dataclass(frozen=True, slots=True, kw_only=True)
class SatelliteGeometry:
    """Per-satellite geometry for one reception epoch (arrays of length m, NaN where invalid).

    ``pos_ecef_m``/``vel_ecef_mps`` (m, 3): at transmission, in the ECEF frame of reception.
    ``clock_s``: satellite clock offset incl. the relativistic term, without group delay.
    ``range_m``: geometric range |pos − rx|.
    """

    sat: npt.NDArray[np.int16]
    valid: npt.NDArray[np.bool_]
    t_tx_gps_s: F64
    pos_ecef_m: F64
    vel_ecef_mps: F64
    clock_s: F64
    range_m: F64
    az_rad: F64
    el_rad: F64


def satellite_geometry(
    t_rx_gps_s: float,
    rx_ecef_m: npt.ArrayLike,
    sat_ids: npt.ArrayLike,
    ephemerides: EphemerisStore | EphemerisSelection,
    *,
    pseudorange_m: npt.ArrayLike | None = None,
    exact: bool = False,
) -> SatelliteGeometry:
    """Geometry of satellites ``sat_ids`` (m,) seen from ``rx_ecef_m`` (3,) at GPS time
    ``t_rx_gps_s``; ephemerides from a store (selected here) or an existing selection for the
    same satellites. ``pseudorange_m`` (m,) fixes the transmit time per satellite; NaN or values
    outside 15,000–50,000 km fall back to the light-time iteration.

    States come from the selection's 30 s grid of exact states (see ``_nodes``: < 0.5 mm from
    the broadcast model); ``exact=True``, or a pseudorange more than a second off the nominal
    flight time, evaluates the broadcast model directly."""
    sats = np.asarray(sat_ids, dtype=np.int16)
    rx = np.asarray(rx_ecef_m, dtype=np.float64)
    assert sats.ndim == 1, sats.shape
    assert rx.shape == (3,), rx.shape
    m = sats.shape[0]
    if isinstance(ephemerides, EphemerisStore):
        sel = ephemerides.select(sats, t_rx_gps_s)
    else:
        sel = ephemerides
        assert np.array_equal(sel.sat, sats), "selection is for other satellites"
    t_rx = float(t_rx_gps_s)
    pr = None if pseudorange_m is None else np.asarray(pseudorange_m, dtype=np.float64)
    if pr is None:
        t0 = np.full(m, t_rx - NOMINAL_FLIGHT_TIME_S)
    else:
        assert pr.shape == (m,), pr.shape
        geometric = ~((pr > _PSEUDORANGE_MIN_M) & (pr < _PSEUDORANGE_MAX_M))  # also NaN
        t0 = t_rx - pr / C_MPS
        t0[geometric] = t_rx - NOMINAL_FLIGHT_TIME_S

    k = sel.kepler_index
    g = sel.glonass_index
    t_ref = t_rx - NOMINAL_FLIGHT_TIME_S
    all_kepler = len(g) == 0 and len(k) == m  # every row Keplerian and valid, in request order
    if not exact and bool(np.all(np.abs(t0 - t_ref) < _MAX_INTERPOLATION_OFFSET_S)):
        pos0, vel0, clk = sel.nodes.interpolate(
            t0, t_ref, sel.kepler, sel.glonass, None if all_kepler else sel.gather_index
        )
    elif all_kepler:
        pos0, vel0, clk = kepler_state(sel.kepler, t0)
    else:
        # One gather from [Keplerian rows, GLONASS rows, a NaN row] back to request order.
        pk, vk, ck = kepler_state(sel.kepler, t0[k])
        pg, vg, cg = glonass_state(sel.glonass, t0[g])
        gi = sel.gather_index
        pos0 = np.concatenate((pk, pg, _NAN_ROW))[gi]
        vel0 = np.concatenate((vk, vg, _NAN_ROW))[gi]
        clk = np.concatenate((ck, cg, _NAN_ROW[0, :1]))[gi]

    # Light time τ = |R(Ω̇e·τ)·p(t_rx − τ) − rx| / c. Pass 1 from the orbit at t0 (τ error
    # ≲ |ρ̇|/c · 0.02 s ≈ 5e-8 s); pass 2 (with the Earth rotation to first order, see
    # _sagnac_range) leaves ~1e-13 s. With a pseudorange, t_tx comes from it instead.
    # Positions move from t0 to t_tx along the velocity (|t_tx − t0| ≤ a few ms: < 0.1 mm).
    if pr is None:
        tau = _light_time(pos0, vel0, t0, t_rx, rx)
        t_tx = t_rx - tau
        pos = pos0 + vel0 * (t_tx - t0)[:, None]
    else:
        t_tx = t0 - clk
        if geometric.any():
            t_tx[geometric] = t_rx - _light_time(pos0, vel0, t0, t_rx, rx)[geometric]
        pos = pos0 + vel0 * (t_tx - t0)[:, None]
        # Earth rotation angle from the geometric flight time, not from the pseudorange (which
        # also carries the receiver clock error).
        tau = _sagnac_range(pos, rx) / C_MPS
    pos_rx, vel_rx = _rotate_z(np.stack((pos, vel0)), tau)
    los = pos_rx - rx
    rng = _norm(los)
    enu = los @ _enu_basis_cached(rx).T
    horiz = np.hypot(enu[:, 0], enu[:, 1])
    az = np.arctan2(enu[:, 0], enu[:, 1]) % (2.0 * np.pi)
    el = np.arctan2(enu[:, 2], horiz)
    return SatelliteGeometry(
        sat=sats,
        valid=sel.valid,
        t_tx_gps_s=t_tx if len(k) == m else np.where(sel.valid, t_tx, np.nan),
        pos_ecef_m=pos_rx,
        vel_ecef_mps=vel_rx,
        clock_s=clk,
        range_m=rng,
        az_rad=az,
        el_rad=el,
    )


def _norm(v: F64) -> F64:
    out: F64 = np.sqrt(np.einsum("ij,ij->i", v, v))
    return out


def _light_time(pos0: F64, vel0: F64, t0: F64, t_rx: float, rx: F64) -> F64:
    """Geometric flight time τ (s): pass 1 from the orbit at t0, pass 2 at t_rx − τ1."""
    tau = _norm(pos0 - rx) / C_MPS
    pos = pos0 + vel0 * (t_rx - tau - t0)[:, None]
    return _sagnac_range(pos, rx) / C_MPS


def _sagnac_range(pos: F64, rx: F64) -> F64:
    """|R(Ω̇e·τ)·pos − rx| to first order in Ω̇e·τ: ρ + Ω̇e/c·(x_s·y_r − y_s·x_r)
    (IS-GPS-200 §20.3.3.4.3.3.2 rotation, linearised; the dropped term is ≲ 1 mm of range)."""
    rho = _norm(pos - rx)
    out: F64 = rho + (OMEGA_E_GPS_RADPS / C_MPS) * (pos[:, 0] * rx[1] - pos[:, 1] * rx[0])
    return out


def _rotate_z(v: F64, tau_s: F64) -> F64:
    """:func:`sagnac_rotate` of (…, m, 3) vectors without the argument checks (hot path)."""
    theta = OMEGA_E_GPS_RADPS * tau_s
    c = np.cos(theta)
    s = np.sin(theta)
    out = v.copy()
    out[..., 0] = c * v[..., 0] + s * v[..., 1]
    out[..., 1] = c * v[..., 1] - s * v[..., 0]
    return out


_basis_cache: dict[bytes, F64] = {}


def _enu_basis_cached(rx: F64) -> F64:
    """ENU basis of the receiver; a reference station does not move, so keep the last few."""
    key = rx.tobytes()
    basis = _basis_cache.get(key)
    if basis is None:
        if len(_basis_cache) >= _BASIS_CACHE_SIZE:
            _basis_cache.clear()
        lat, lon, _ = ecef_to_geodetic(rx)
        basis = enu_basis(float(lat), float(lon))
        _basis_cache[key] = basis
    return basis


_BASIS_CACHE_SIZE = 16
_NAN_ROW = np.full((1, 3), np.nan)
_NAN_ROW.setflags(write=False)
