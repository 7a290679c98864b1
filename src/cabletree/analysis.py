"""Features of simulated voltage traces: spikes, back-propagation, EPSPs, passive constants.

Every function takes a results Dataset (dims ``time`` × ``site``, variable ``v`` in mV, see
:mod:`cabletree.results`) or plain arrays, and returns arrays, small frozen dataclasses or a
labelled Dataset over ``site``.  Each output variable and coordinate carries ``units`` and
``long_name`` attributes set here, because xarray drops attributes in arithmetic.

Conventions
-----------
* A *spike* is a local maximum of the membrane potential that is at least ``threshold_mV`` high,
  stands out from its surroundings by at least ``prominence_mV`` (topographic prominence: the
  height of the peak above the higher of the two lowest points that separate it from any higher
  part of the trace, or from the trace ends) and lies at least ``min_interval_ms`` from any
  higher spike.  A peak-based detector is used because spike peaks during fast repetitive firing
  can fall below 0 mV (the Hodgkin & Huxley 1952 model peaks near -20 mV at high current), where
  a 0 mV crossing detector silently misses spikes.
* Peak values and times of bAPs and EPSPs are refined between samples by fitting a parabola
  through the sample maximum and its two neighbours (common practice); half-widths use linear
  interpolation of the two half-amplitude crossings.
* Times are ms, potentials mV, distances µm, currents nA, resistances MΩ (mV/nA = MΩ).
"""

from __future__ import annotations

import csv
import io
import os
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
import xarray as xr

from cabletree.errors import ResultsError
from cabletree.fileio import write_atomically

__all__ = [
    "spike_times",
    "spike_features",
    "interspike_intervals",
    "bap_features",
    "PropagationFit",
    "propagation_speed_um_per_ms",
    "epsp_features",
    "DendriticSpike",
    "detect_dendritic_spike",
    "input_resistance_MOhm",
    "ExponentialFit",
    "fit_exponential",
    "membrane_time_constant_ms",
    "features_table",
]


# --------------------------------------------------------------------------------------------
# Low-level helpers on 1-D arrays
# --------------------------------------------------------------------------------------------


def _local_maxima(v: np.ndarray) -> np.ndarray:
    """Indices of strict local maxima of ``v``; a flat top is reported at its middle sample."""
    starts = np.flatnonzero(np.r_[True, np.diff(v) != 0])
    ends = np.r_[starts[1:] - 1, len(v) - 1]
    w = v[starts]
    k = np.flatnonzero((w[1:-1] > w[:-2]) & (w[1:-1] > w[2:])) + 1
    return (starts[k] + ends[k]) // 2


def _is_prominent(v: list[float], peak: int, prominence_mV: float) -> bool:
    """Whether sample ``peak`` has topographic prominence ≥ ``prominence_mV`` (module notes).

    The prominence is at least ``p`` exactly when, on each side, the trace falls to
    ``v[peak] − p`` or below before it rises above ``v[peak]`` (or ends).  Each side is
    scanned only that far, so the cost scales with the spike width, not the trace length.
    """
    height = v[peak]
    level = height - prominence_mV
    for step in (-1, 1):
        i = peak + step
        while 0 <= i < len(v) and v[i] <= height and v[i] > level:
            i += step
        if not (0 <= i < len(v)) or v[i] > height:
            return False
    return True


def _enforce_min_interval(peaks: np.ndarray, v: np.ndarray, t: np.ndarray,
                          min_interval_ms: float) -> np.ndarray:
    """Keep the highest peaks such that no two kept peaks are closer than ``min_interval_ms``."""
    order = sorted(range(len(peaks)), key=lambda k: (-v[peaks[k]], peaks[k]))
    kept: list[int] = []
    for k in order:
        if all(abs(t[peaks[k]] - t[peaks[m]]) >= min_interval_ms for m in kept):
            kept.append(k)
    return np.sort(peaks[kept]) if kept else np.zeros(0, dtype=int)


def _crossing_time(t: np.ndarray, v: np.ndarray, i: int, level: float) -> float:
    """Time at which ``v`` crosses ``level`` between samples ``i`` and ``i + 1`` (linear)."""
    v0, v1 = v[i], v[i + 1]
    if v1 == v0:
        return float(t[i])
    return float(t[i] + (level - v0) * (t[i + 1] - t[i]) / (v1 - v0))


def _spike_peak_indices(v: np.ndarray, t: np.ndarray, threshold_mV: float,
                        min_interval_ms: float, prominence_mV: float) -> np.ndarray:
    candidates = _local_maxima(v)
    candidates = candidates[v[candidates] >= threshold_mV]
    values = v.tolist()
    candidates = np.asarray([p for p in candidates if _is_prominent(values, int(p), prominence_mV)],
                            dtype=int)
    return _enforce_min_interval(candidates, v, t, min_interval_ms)


def spike_times(v: np.ndarray, time_ms: np.ndarray, threshold_mV: float = -20.0,
                min_interval_ms: float = 1.0, prominence_mV: float = 10.0,
                reference: str = "peak") -> np.ndarray:
    """Spike times of one membrane-potential trace.

    A spike is a local maximum of ``v`` at least ``threshold_mV`` high, with topographic
    prominence at least ``prominence_mV`` and at least ``min_interval_ms`` from any higher spike
    (the lower of two close peaks is dropped).  The detector is peak-based because spike peaks
    during fast firing can fall below 0 mV (Hodgkin & Huxley 1952 model at high current).

    Parameters
    ----------
    v : ndarray, shape (n_time,)
        Membrane potential, mV.
    time_ms : ndarray, shape (n_time,)
        Sample times, ms, increasing.
    threshold_mV : float
        Minimum peak height, mV.
    min_interval_ms : float
        Minimum time between accepted spikes, ms.
    prominence_mV : float
        Minimum prominence of a peak, mV.
    reference : {"peak", "crossing"}
        ``"peak"`` returns the sample times of the peaks (exact to the sampling step);
        ``"crossing"`` returns, for each spike, the linearly interpolated time of the last
        upward crossing of ``threshold_mV`` before its peak; the crossing is searched after the
        lowest point between the previous spike (or the trace start) and this peak, and is NaN
        when the trace does not go below ``threshold_mV`` there.

    Returns
    -------
    ndarray, shape (n_spikes,)
        Spike times, ms, increasing.
    """
    v = np.asarray(v, dtype=float)
    t = np.asarray(time_ms, dtype=float)
    if v.ndim != 1 or v.shape != t.shape:
        raise ResultsError(f"spike_times: v and time_ms must be 1-D of equal length; got shapes "
                           f"{v.shape} and {t.shape}")
    if reference not in ("peak", "crossing"):
        raise ResultsError(f"spike_times: reference must be 'peak' or 'crossing', got {reference!r}")
    peaks = _spike_peak_indices(v, t, threshold_mV, min_interval_ms, prominence_mV)
    if reference == "peak":
        return t[peaks]
    out = np.full(len(peaks), np.nan)
    previous = 0
    for k, p in enumerate(peaks):
        trough = previous + int(np.argmin(v[previous:p + 1]))
        below = np.flatnonzero(v[trough:p] < threshold_mV)
        if below.size:
            i = trough + below[-1]
            out[k] = _crossing_time(t, v, i, threshold_mV)
        previous = p
    return out


# --------------------------------------------------------------------------------------------
# Dataset plumbing
# --------------------------------------------------------------------------------------------

def _check_results(ds: xr.Dataset, where: str) -> None:
    if "v" not in ds.data_vars:
        raise ResultsError(f"{where}: the Dataset has no variable 'v' (membrane potential, mV)")
    if tuple(ds["v"].dims) != ("time", "site"):
        raise ResultsError(f"{where}: expected v with dims ('time', 'site'), got {ds['v'].dims}; "
                           f"select one run of a sweep first (e.g. ds.isel(...))")


def _site_names(ds: xr.Dataset, sites: Iterable[str] | None, where: str) -> list[str]:
    available = [str(s) for s in ds["site"].values]
    if sites is None:
        return available
    names = [str(s) for s in sites]
    missing = [s for s in names if s not in available]
    if missing:
        raise ResultsError(f"{where}: unknown site(s) {missing}; the Dataset has sites {available}")
    return names


def _trace(ds: xr.Dataset, site: str, where: str) -> np.ndarray:
    _site_names(ds, [site], where)
    return np.asarray(ds["v"].sel(site=site).values, dtype=float)


def _time(ds: xr.Dataset) -> np.ndarray:
    return np.asarray(ds["time"].values, dtype=float)


def _labelled(var: np.ndarray, units: str, long_name: str) -> tuple:
    return ("site", np.asarray(var), {"units": units, "long_name": long_name})


def _site_dataset(ds: xr.Dataset, names: list[str], data_vars: dict, attrs: dict) -> xr.Dataset:
    """Dataset over ``site`` with ``data_vars`` and every site coordinate of ``ds`` kept."""
    sub = ds.sel(site=names)
    coords = {"site": ("site", sub["site"].values,
                       {"long_name": "recording site", **sub["site"].attrs})}
    for name, coord in sub.coords.items():
        if name != "site" and coord.dims == ("site",):
            coords[name] = ("site", coord.values, dict(coord.attrs))
    return xr.Dataset(data_vars, coords=coords, attrs=attrs)


# --------------------------------------------------------------------------------------------
# Spike trains
# --------------------------------------------------------------------------------------------


def interspike_intervals(ds: xr.Dataset, site: str, *, onset_ms: float = 0.0,
                         threshold_mV: float = -20.0, min_interval_ms: float = 1.0,
                         prominence_mV: float = 10.0) -> np.ndarray:
    """Inter-spike intervals at one site, ms (a ragged quantity, hence an array per site).

    Parameters
    ----------
    ds : xarray.Dataset
        Results of one run (``v`` over ``time`` × ``site``).
    site : str
        Site name.
    onset_ms : float
        Only spikes at or after this time are used, ms.
    threshold_mV, min_interval_ms, prominence_mV : float
        Detector settings, see :func:`spike_times`.

    Returns
    -------
    ndarray, shape (max(n_spikes - 1, 0),)
        Intervals between consecutive spike peaks, ms.
    """
    _check_results(ds, "interspike_intervals")
    times = spike_times(_trace(ds, site, "interspike_intervals"), _time(ds), threshold_mV,
                        min_interval_ms, prominence_mV)
    return np.diff(times[times >= onset_ms])


def spike_features(ds: xr.Dataset, *, onset_ms: float = 0.0, end_ms: float | None = None,
                   sites: Sequence[str] | None = None, threshold_mV: float = -20.0,
                   min_interval_ms: float = 1.0, prominence_mV: float = 10.0) -> xr.Dataset:
    """Spike count, first-spike latency and mean firing rate at each site.

    Spikes are counted in the window ``[onset_ms, end_ms]`` (``end_ms`` defaults to the last
    sample); the mean firing rate is count / window length.

    Parameters
    ----------
    ds : xarray.Dataset
        Results of one run.
    onset_ms : float
        Stimulus onset, ms; latencies are measured from it.
    end_ms : float, optional
        End of the counting window, ms.
    sites : sequence of str, optional
        Sites to analyse (default all).
    threshold_mV, min_interval_ms, prominence_mV : float
        Detector settings, see :func:`spike_times`.

    Returns
    -------
    xarray.Dataset
        Over ``site``: ``spike_count`` (1), ``first_spike_latency_ms`` (ms, NaN without a
        spike), ``mean_firing_rate_Hz`` (Hz); site coordinates of ``ds`` kept.
    """
    _check_results(ds, "spike_features")
    names = _site_names(ds, sites, "spike_features")
    t = _time(ds)
    stop = float(t[-1]) if end_ms is None else float(end_ms)
    if stop <= onset_ms:
        raise ResultsError(f"spike_features: end_ms ({stop}) must be after onset_ms ({onset_ms})")
    counts, latencies = [], []
    for name in names:
        times = spike_times(ds["v"].sel(site=name).values, t, threshold_mV, min_interval_ms,
                            prominence_mV)
        times = times[(times >= onset_ms) & (times <= stop)]
        counts.append(len(times))
        latencies.append(times[0] - onset_ms if len(times) else np.nan)
    counts_arr = np.asarray(counts, dtype=int)
    data = {
        "spike_count": _labelled(counts_arr, "1", "number of spikes in the window"),
        "first_spike_latency_ms": _labelled(np.asarray(latencies, dtype=float), "ms",
                                            "first-spike latency from stimulus onset"),
        "mean_firing_rate_Hz": _labelled(counts_arr * 1000.0 / (stop - onset_ms), "Hz",
                                         "mean firing rate in the window"),
    }
    attrs = {"onset_ms": float(onset_ms), "end_ms": stop, "threshold_mV": float(threshold_mV),
             "min_interval_ms": float(min_interval_ms), "prominence_mV": float(prominence_mV)}
    return _site_dataset(ds, names, data, attrs)


# --------------------------------------------------------------------------------------------
# Peaks, amplitudes and half-widths (shared by bAP and EPSP features)
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Peak:
    amplitude_mV: float
    time_ms: float
    half_width_ms: float


def _mean_in(t: np.ndarray, v: np.ndarray, t0: float, t1: float, where: str,
             include_end: bool = False) -> float:
    """Mean of ``v`` over ``[t0, t1)`` (or ``[t0, t1]`` with ``include_end``)."""
    mask = (t >= t0) & ((t <= t1) if include_end else (t < t1))
    if not mask.any():
        raise ResultsError(f"{where}: the baseline window [{t0}, {t1}) ms contains no samples "
                           f"(trace spans {t[0]}..{t[-1]} ms)")
    return float(v[mask].mean())


def _peak(t: np.ndarray, v: np.ndarray, baseline_mV: float, t0: float, t1: float) -> _Peak:
    """Largest depolarisation above ``baseline_mV`` in ``[t0, t1]``, with its half-width.

    The peak is refined by a parabola through the maximum sample and its neighbours; the
    half-width is the time between the linearly interpolated upward and downward crossings of
    baseline + amplitude/2 around the peak (NaN if either is not reached inside the trace).
    """
    idx = np.flatnonzero((t >= t0) & (t <= t1))
    if idx.size == 0:
        return _Peak(np.nan, np.nan, np.nan)
    i = int(idx[np.argmax(v[idx])])
    peak_v, peak_t = float(v[i]), float(t[i])
    if 0 < i < len(v) - 1:
        a, b, c = v[i - 1], v[i], v[i + 1]
        denom = a - 2 * b + c
        if denom < 0:
            shift = 0.5 * (a - c) / denom
            peak_v = float(b - 0.25 * (a - c) * shift)
            peak_t = float(t[i] + shift * 0.5 * (t[i + 1] - t[i - 1]))
    amplitude = peak_v - baseline_mV
    half = baseline_mV + 0.5 * amplitude
    below_left = np.flatnonzero(v[:i] < half)
    below_right = np.flatnonzero(v[i:] < half)
    if amplitude <= 0 or not below_left.size or not below_right.size:
        return _Peak(amplitude, peak_t, np.nan)
    left = _crossing_time(t, v, int(below_left[-1]), half)
    right = _crossing_time(t, v, i + int(below_right[0]) - 1, half)
    return _Peak(amplitude, peak_t, right - left)


def bap_features(ds: xr.Dataset, *, soma_site: str = "soma",
                 window_ms: tuple[float, float] | None = None,
                 baseline_before_peak_ms: tuple[float, float] = (3.0, 1.0),
                 peak_search_ms: tuple[float, float] = (2.0, 8.0),
                 sites: Sequence[str] | None = None, threshold_mV: float = -20.0,
                 min_interval_ms: float = 1.0, prominence_mV: float = 10.0) -> xr.Dataset:
    """Back-propagating action potential: amplitude, latency, half-width and attenuation.

    The somatic spike is the first spike (see :func:`spike_times`) at ``soma_site`` inside
    ``window_ms`` (default the whole trace); let ``t_s`` be its peak time.  For every site the
    baseline is the mean of v over ``[t_s - b0, t_s - b1)`` with
    ``(b0, b1) = baseline_before_peak_ms``, and the peak is the maximum of v over
    ``[t_s - p0, t_s + p1]`` with ``(p0, p1) = peak_search_ms`` (clipped to ``window_ms``).

    Parameters
    ----------
    ds : xarray.Dataset
        Results of one run.
    soma_site : str
        Name of the somatic site.
    window_ms : (float, float), optional
        Time window, ms, holding the spike to analyse.
    baseline_before_peak_ms : (float, float)
        Baseline window before the somatic peak, ms (start, end offsets, start > end).
    peak_search_ms : (float, float)
        How long before and after the somatic peak each site's peak is searched, ms.
    sites : sequence of str, optional
        Sites to analyse (default all).
    threshold_mV, min_interval_ms, prominence_mV : float
        Settings for detecting the somatic spike, see :func:`spike_times`.

    Returns
    -------
    xarray.Dataset
        Over ``site``: ``baseline_mV``, ``amplitude_mV`` (peak minus baseline), ``peak_time_ms``,
        ``latency_ms`` (peak time minus somatic peak time), ``half_width_ms`` (full width at half
        amplitude) and ``attenuation_ratio`` (amplitude / somatic amplitude, 1); site
        coordinates of ``ds`` (path_distance_um, swc_type, ...) kept.  attrs hold the somatic
        peak time and the windows used.

    Raises
    ------
    ResultsError
        If no somatic spike is found in the window.
    """
    _check_results(ds, "bap_features")
    names = _site_names(ds, sites, "bap_features")
    t = _time(ds)
    lo, hi = (float(t[0]), float(t[-1])) if window_ms is None else map(float, window_ms)
    soma_v = _trace(ds, soma_site, "bap_features")
    soma_times = spike_times(soma_v, t, threshold_mV, min_interval_ms, prominence_mV)
    soma_times = soma_times[(soma_times >= lo) & (soma_times <= hi)]
    if not soma_times.size:
        raise ResultsError(f"bap_features: no spike at site {soma_site!r} in the window "
                           f"[{lo}, {hi}] ms (threshold {threshold_mV} mV, prominence "
                           f"{prominence_mV} mV)")
    t_s = float(soma_times[0])
    b0, b1 = baseline_before_peak_ms
    p0, p1 = peak_search_ms
    search = (max(lo, t_s - p0), min(hi, t_s + p1))

    def features(v: np.ndarray) -> tuple[float, _Peak]:
        baseline = _mean_in(t, v, t_s - b0, t_s - b1, "bap_features")
        return baseline, _peak(t, v, baseline, *search)

    soma_baseline, soma_peak = features(soma_v)
    rows = [features(np.asarray(ds["v"].sel(site=n).values, dtype=float)) for n in names]
    baseline = np.asarray([r[0] for r in rows])
    amplitude = np.asarray([r[1].amplitude_mV for r in rows])
    peak_time = np.asarray([r[1].time_ms for r in rows])
    data = {
        "baseline_mV": _labelled(baseline, "mV", "baseline membrane potential before the spike"),
        "amplitude_mV": _labelled(amplitude, "mV", "bAP amplitude from baseline"),
        "peak_time_ms": _labelled(peak_time, "ms", "time of the bAP peak"),
        "latency_ms": _labelled(peak_time - soma_peak.time_ms, "ms",
                                "bAP peak latency relative to the somatic peak"),
        "half_width_ms": _labelled(np.asarray([r[1].half_width_ms for r in rows]), "ms",
                                   "bAP full width at half amplitude"),
        "attenuation_ratio": _labelled(amplitude / soma_peak.amplitude_mV, "1",
                                       "bAP amplitude relative to the somatic amplitude"),
    }
    attrs = {"soma_site": soma_site, "soma_peak_time_ms": soma_peak.time_ms,
             "soma_baseline_mV": soma_baseline,
             "baseline_window_ms": [t_s - b0, t_s - b1], "peak_search_window_ms": list(search)}
    return _site_dataset(ds, names, data, attrs)


@dataclass(frozen=True)
class PropagationFit:
    """Least-squares line latency = intercept + distance / speed.

    Attributes
    ----------
    speed_um_per_ms : float
        Apparent propagation speed, µm/ms (1 µm/ms = 1 mm/s).
    intercept_ms : float
        Latency at zero path distance, ms.
    r_squared : float
        Coefficient of determination of the fit, 1.
    slope_stderr_ms_per_um : float
        Standard error of the slope, ms/µm.
    n_sites : int
        Number of sites used.
    """

    speed_um_per_ms: float
    intercept_ms: float
    r_squared: float
    slope_stderr_ms_per_um: float
    n_sites: int


def propagation_speed_um_per_ms(features: xr.Dataset, swc_types: Sequence[int] = (4,), *,
                                variable: str = "latency_ms") -> PropagationFit:
    """Apparent propagation speed from a linear fit of latency against path distance.

    Parameters
    ----------
    features : xarray.Dataset
        Output of :func:`bap_features` (needs ``latency_ms``, ``path_distance_um``, ``swc_type``).
    swc_types : sequence of int
        SWC types of the sites to include (1 soma, 2 axon, 3 basal, 4 apical).
    variable : str
        Latency variable, ms.

    Returns
    -------
    PropagationFit
        Speed (inverse slope), intercept and fit quality (scipy.stats.linregress).

    Raises
    ------
    ResultsError
        With fewer than 3 usable sites or a non-positive slope.
    """
    from scipy.stats import linregress

    for name in (variable, "path_distance_um", "swc_type"):
        if name not in features.variables:
            raise ResultsError(f"propagation_speed_um_per_ms: features lack {name!r}")
    x = np.asarray(features["path_distance_um"].values, dtype=float)
    y = np.asarray(features[variable].values, dtype=float)
    keep = np.isin(features["swc_type"].values, list(swc_types)) & np.isfinite(x) & np.isfinite(y)
    if keep.sum() < 3:
        raise ResultsError(f"propagation_speed_um_per_ms: need at least 3 sites with SWC types "
                           f"{tuple(swc_types)} and finite latency, found {int(keep.sum())}")
    fit = linregress(x[keep], y[keep])
    if not fit.slope > 0:
        raise ResultsError(f"propagation_speed_um_per_ms: latency does not increase with distance "
                           f"(slope {fit.slope:g} ms/um); no forward propagation to measure")
    return PropagationFit(1.0 / fit.slope, float(fit.intercept), float(fit.rvalue ** 2),
                          float(fit.stderr), int(keep.sum()))


# --------------------------------------------------------------------------------------------
# Synaptic input
# --------------------------------------------------------------------------------------------


def epsp_features(ds: xr.Dataset, onset_ms: float, sites: Sequence[str] | None = None, *,
                  baseline_ms: float = 5.0, end_ms: float | None = None) -> xr.Dataset:
    """EPSP peak depolarisation, time to peak and half-width at each site.

    Parameters
    ----------
    ds : xarray.Dataset
        Results of one run.
    onset_ms : float
        Input onset, ms.
    sites : sequence of str, optional
        Sites to analyse (default all).
    baseline_ms : float
        Length of the pre-onset window ``[onset - baseline_ms, onset)`` whose mean is the
        baseline, ms.
    end_ms : float, optional
        End of the peak search window ``[onset_ms, end_ms]`` (default the last sample), ms.

    Returns
    -------
    xarray.Dataset
        Over ``site``: ``baseline_mV``, ``amplitude_mV`` (peak depolarisation from baseline),
        ``time_to_peak_ms`` (from onset), ``half_width_ms``; site coordinates kept.
    """
    _check_results(ds, "epsp_features")
    names = _site_names(ds, sites, "epsp_features")
    t = _time(ds)
    stop = float(t[-1]) if end_ms is None else float(end_ms)
    baselines, peaks = [], []
    for name in names:
        v = np.asarray(ds["v"].sel(site=name).values, dtype=float)
        baselines.append(_mean_in(t, v, onset_ms - baseline_ms, onset_ms, "epsp_features"))
        peaks.append(_peak(t, v, baselines[-1], onset_ms, stop))
    data = {
        "baseline_mV": _labelled(np.asarray(baselines), "mV", "membrane potential before input"),
        "amplitude_mV": _labelled(np.asarray([p.amplitude_mV for p in peaks]), "mV",
                                  "peak depolarisation from baseline"),
        "time_to_peak_ms": _labelled(np.asarray([p.time_ms for p in peaks]) - onset_ms, "ms",
                                     "time to peak from input onset"),
        "half_width_ms": _labelled(np.asarray([p.half_width_ms for p in peaks]), "ms",
                                   "full width at half amplitude"),
    }
    attrs = {"onset_ms": float(onset_ms), "baseline_ms": float(baseline_ms), "end_ms": stop}
    return _site_dataset(ds, names, data, attrs)


@dataclass(frozen=True)
class DendriticSpike:
    """Outcome of :func:`detect_dendritic_spike`.

    Attributes
    ----------
    occurred : bool
        True if the dendritic site crossed its threshold before the soma crossed its own (or the
        soma never did).
    dendritic_crossing_ms : float
        First upward threshold crossing at the dendritic site, ms (NaN if none).
    soma_crossing_ms : float
        First upward threshold crossing at the soma, ms (NaN if none).
    lead_ms : float
        ``soma_crossing_ms - dendritic_crossing_ms`` (NaN if either is missing), ms.
    """

    occurred: bool
    dendritic_crossing_ms: float
    soma_crossing_ms: float
    lead_ms: float


def _first_upward_crossing(t: np.ndarray, v: np.ndarray, level: float, t0: float,
                           t1: float) -> float:
    idx = np.flatnonzero((t[:-1] >= t0) & (t[1:] <= t1) & (v[:-1] < level) & (v[1:] >= level))
    return _crossing_time(t, v, int(idx[0]), level) if idx.size else np.nan


def detect_dendritic_spike(ds: xr.Dataset, dendritic_site: str, soma_site: str = "soma",
                           threshold_mV: float = -20.0, *, soma_threshold_mV: float | None = None,
                           window_ms: tuple[float, float] | None = None) -> DendriticSpike:
    """Whether a local spike arose at a dendritic site before the soma reached threshold.

    A dendritic spike is declared when v at ``dendritic_site`` crosses ``threshold_mV`` upwards
    inside ``window_ms`` and either the soma does not cross ``soma_threshold_mV`` there or it
    crosses later (crossing times linearly interpolated).  This is the operational criterion
    of a dendrite firing first; it does not by itself exclude a large passive depolarisation,
    so choose ``threshold_mV`` above the largest subthreshold response expected.

    Parameters
    ----------
    ds : xarray.Dataset
        Results of one run.
    dendritic_site, soma_site : str
        Site names.
    threshold_mV : float
        Dendritic threshold, mV.
    soma_threshold_mV : float, optional
        Somatic threshold, mV (default ``threshold_mV``).
    window_ms : (float, float), optional
        Time window searched, ms (default the whole trace).

    Returns
    -------
    DendriticSpike
    """
    _check_results(ds, "detect_dendritic_spike")
    t = _time(ds)
    lo, hi = (float(t[0]), float(t[-1])) if window_ms is None else map(float, window_ms)
    soma_level = threshold_mV if soma_threshold_mV is None else soma_threshold_mV
    t_dend = _first_upward_crossing(t, _trace(ds, dendritic_site, "detect_dendritic_spike"),
                                    threshold_mV, lo, hi)
    t_soma = _first_upward_crossing(t, _trace(ds, soma_site, "detect_dendritic_spike"),
                                    soma_level, lo, hi)
    occurred = bool(np.isfinite(t_dend) and (np.isnan(t_soma) or t_dend < t_soma))
    return DendriticSpike(occurred, float(t_dend), float(t_soma), float(t_soma - t_dend))


# --------------------------------------------------------------------------------------------
# Passive properties
# --------------------------------------------------------------------------------------------


def input_resistance_MOhm(ds: xr.Dataset, site: str, current_nA: float, t_before_ms: float,
                          t_steady_ms: float, *, average_ms: float = 1.0) -> float:
    """Input resistance from the steady response to a current step, MΩ.

    R = (V_steady − V_before) / I, with each potential the mean of v over the ``average_ms``
    preceding the given time; mV / nA = MΩ.

    Parameters
    ----------
    ds : xarray.Dataset
        Results of one run.
    site : str
        Site where the step was injected (input resistance) or recorded (transfer resistance).
    current_nA : float
        Step amplitude, nA (non-zero).
    t_before_ms : float
        Time before the step onset, ms.
    t_steady_ms : float
        Time at which the response is at steady state, ms.
    average_ms : float
        Averaging window ending at each time, ms.

    Returns
    -------
    float
        Resistance, MΩ.
    """
    _check_results(ds, "input_resistance_MOhm")
    if current_nA == 0:
        raise ResultsError("input_resistance_MOhm: current_nA must be non-zero")
    t = _time(ds)
    v = _trace(ds, site, "input_resistance_MOhm")
    before = _mean_in(t, v, t_before_ms - average_ms, t_before_ms, "input_resistance_MOhm", True)
    steady = _mean_in(t, v, t_steady_ms - average_ms, t_steady_ms, "input_resistance_MOhm", True)
    return (steady - before) / current_nA


@dataclass(frozen=True)
class ExponentialFit:
    """Fit v(t) = v_inf + amplitude · exp(−(t − t0)/τ).

    Attributes
    ----------
    tau_ms : float
        Time constant, ms.
    amplitude_mV : float
        Value of v − v_inf at the window start t0, mV (negative for a charging curve).
    v_inf_mV : float
        Asymptote, mV.
    t0_ms : float
        Start of the fit window, ms.
    rmse_mV : float
        Root-mean-square residual, mV.
    """

    tau_ms: float
    amplitude_mV: float
    v_inf_mV: float
    t0_ms: float
    rmse_mV: float


def fit_exponential(time_ms: np.ndarray, v: np.ndarray) -> ExponentialFit:
    """Least-squares single-exponential fit (scipy.optimize.curve_fit) of a relaxation.

    Parameters
    ----------
    time_ms : ndarray, shape (n,)
        Times of the fit window, ms (n ≥ 4).
    v : ndarray, shape (n,)
        Membrane potential, mV.

    Returns
    -------
    ExponentialFit
    """
    from scipy.optimize import curve_fit

    t = np.asarray(time_ms, dtype=float)
    y = np.asarray(v, dtype=float)
    if t.size < 4:
        raise ResultsError(f"fit_exponential: need at least 4 samples in the window, got {t.size}")
    t0 = float(t[0])

    def model(tt, tau, amp, vinf):
        return vinf + amp * np.exp(-(tt - t0) / tau)

    p0 = (max((t[-1] - t0) / 3.0, 1e-6), y[0] - y[-1], y[-1])
    params, _ = curve_fit(model, t, y, p0=p0, maxfev=10000)
    rmse = float(np.sqrt(np.mean((model(t, *params) - y) ** 2)))
    return ExponentialFit(float(params[0]), float(params[1]), float(params[2]), t0, rmse)


def membrane_time_constant_ms(ds: xr.Dataset, site: str, fit_window_ms: tuple[float, float]) -> float:
    """Membrane time constant from a single-exponential fit of a charging or decay curve, ms.

    The fit covers ``fit_window_ms`` only.  For an isopotential cell any window after the step
    works; for a cell with dendrites, start the window late enough that the faster equalising
    time constants have died away (Rall 1969, Biophys J 9:1483–1508), so that the slowest
    exponential τ0 (= Rm·Cm for a uniform passive membrane) dominates.

    Parameters
    ----------
    ds : xarray.Dataset
        Results of one run.
    site : str
        Site name.
    fit_window_ms : (float, float)
        Start and end of the fit window, ms.

    Returns
    -------
    float
        Time constant, ms.
    """
    _check_results(ds, "membrane_time_constant_ms")
    t = _time(ds)
    v = _trace(ds, site, "membrane_time_constant_ms")
    mask = (t >= fit_window_ms[0]) & (t <= fit_window_ms[1])
    return fit_exponential(t[mask], v[mask]).tau_ms


# --------------------------------------------------------------------------------------------
# Export
# --------------------------------------------------------------------------------------------

_NO_UNITS = ("", "1", "dimensionless")


def _unit_parts(units: str) -> list[tuple[str, int]]:
    """Split a CF-style unit string into (symbol, exponent) pairs.

    Accepts the space-separated CF form (``"S cm-2"``, ``"ms-1"``, ``"um2"``) and the slash
    form (``"S/cm2"``); ``"µ"`` is read as ``"u"``.
    """
    text = units.replace("µ", "u").strip()
    numerator, _, denominator = text.partition("/")
    parts = []
    for sign, group in ((1, numerator), (-1, denominator)):
        for token in group.split():
            symbol = token.rstrip("-0123456789")
            power = token[len(symbol):]
            parts.append((symbol, sign * (int(power) if power not in ("", "-") else 1)))
    return parts


def _units_token(units: str) -> str:
    """Units as a name suffix: ``"S cm-2"`` → ``"S_per_cm2"``, ``"ms-1"`` → ``"per_ms"``."""
    parts = _unit_parts(units)
    def piece(symbol: str, power: int) -> str:
        return symbol + (str(abs(power)) if abs(power) != 1 else "")
    up = [piece(s, p) for s, p in parts if p > 0]
    down = [piece(s, p) for s, p in parts if p < 0]
    return "_".join(up + (["per"] + down if down else []))


def _column_header(name: str, units: str) -> str:
    """Column name with its units appended unless the name already ends with them."""
    if units in _NO_UNITS:
        return name
    token = _units_token(units)
    if name.endswith("_" + token):
        return name
    return f"{name}_{token}"


def features_table(features: xr.Dataset, path: str | os.PathLike | None = None) -> str:
    """CSV table of a features Dataset over one dimension, with units in the column headers.

    Columns: the dimension coordinate (e.g. ``site``), then every other coordinate on that
    dimension, then the data variables; a column whose name does not already end in its
    ``units`` gets them appended (``amplitude`` with units mV → ``amplitude_mV``).

    Parameters
    ----------
    features : xarray.Dataset
        One-dimensional Dataset, e.g. from :func:`bap_features`.
    path : str or path-like, optional
        If given, the CSV is also written there (atomically: temporary file, then rename).

    Returns
    -------
    str
        The CSV text.
    """
    if len(features.dims) != 1:
        raise ResultsError(f"features_table: expected a Dataset over one dimension, got dims "
                           f"{tuple(features.dims)}")
    (dim,) = features.dims
    names = [dim] + [n for n, c in features.coords.items() if n != dim and c.dims == (dim,)]
    names += [n for n, c in features.data_vars.items() if c.dims == (dim,)]
    headers = [_column_header(n, str(features[n].attrs.get("units", ""))) for n in names]
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(headers)
    columns = [np.asarray(features[n].values) for n in names]
    for row in zip(*columns):
        writer.writerow([_cell(x) for x in row])
    text = buffer.getvalue()
    if path is not None:
        write_atomically(path, lambda tmp: tmp.write_text(text, encoding="utf-8"))
    return text


def _cell(value) -> str:
    if isinstance(value, (float, np.floating)):
        return "nan" if np.isnan(value) else repr(float(value))
    if isinstance(value, (np.integer,)):
        return str(int(value))
    return str(value)
