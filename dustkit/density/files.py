"""A density model's state, and the FITS layout of its file (written and read through :mod:`dustkit.io`).

Extensions: ``SKYMODEL`` (full sky, HEALPix keywords PIXTYPE, ORDERING, COORDSYS, NSIDE,
INDXSCHM='IMPLICIT'; one row per pixel with ``AV`` and ``AV_ERR`` at every distance edge,
for readers of the convention), ``DISTANCE_EDGES``, ``STATE`` (the model's parameters, layer
and chosen hyperparameters as exact JSON), ``TRACERS`` (as the binned model's files have it,
:mod:`dustkit.tracers.stored`: the reddening as measured, so that a loaded model converts it
again under another law), ``CV`` and one image extension per array the answers use
(``ARR_AV_``, ``ARR_SAMPLES_``, ...), stored in their own dtype so a loaded model answers bit
for bit like the saved one, posterior draws included.
"""

import json

import numpy as np
from astropy.table import Table

from ..grid import Grid
from ..layer import DustLayer, given_layer
from ..tracers.stored import tracer_columns, tracer_set, tracers_from_hdu, tracers_hdu
from .estimator import DensityModel

__all__ = ["MODEL_KIND", "density_hdus", "density_from_parts", "density_state", "density_from_state"]

#: Value of the ``DKMODEL`` keyword of a density model file.
MODEL_KIND = "DENSITY"


def _plain(obj):
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, np.generic):
        return obj.item()
    return obj


def density_hdus(model):
    """The extensions (after the primary HDU) of a density model file."""
    from astropy.io import fits

    state = density_state(model)
    g = model.grid_
    av, err = state["arrays"]["av_"], state["arrays"]["av_err_"]
    sky = fits.BinTableHDU.from_columns([
        fits.Column(name="AV", format=f"{g.n_edges}D", unit="mag", array=av),
        fits.Column(name="AV_ERR", format=f"{g.n_edges}D", unit="mag", array=err),
    ], name="SKYMODEL")
    h = sky.header
    h["PIXTYPE"], h["ORDERING"], h["COORDSYS"], h["NSIDE"] = "HEALPIX", g.ordering.upper(), "G", g.nside
    h["INDXSCHM"], h["OBJECT"], h["FIRSTPIX"], h["LASTPIX"] = "IMPLICIT", "FULLSKY", 0, g.npix - 1
    h["DKMODEL"] = MODEL_KIND
    edges = fits.BinTableHDU.from_columns([fits.Column(name="DISTANCE", format="D", unit="pc",
                                                       array=g.distance_edges)], name="DISTANCE_EDGES")
    meta = {k: state[k] for k in ("params", "grid", "layer", "scalars", "tracer_info", "report")}
    blob = json.dumps(_plain(meta))  # floats as repr: exact round trip
    st = fits.BinTableHDU.from_columns([fits.Column(name="JSON", format=f"{len(blob)}A",
                                                    array=np.array([blob.encode()]))], name="STATE")
    st.header["DKMODEL"] = MODEL_KIND
    t = model.tracers_
    arrays, info = tracer_columns(t)
    hdus = [sky, edges, st, tracers_hdu(arrays, info, row=getattr(t, "row", None),
                                        distance_kind=getattr(t, "distance_kind", "distance"))]
    for k, v in state["arrays"].items():
        hdus.append(fits.ImageHDU(np.ascontiguousarray(v), name=f"ARR_{k.upper()}"))
    if state.get("cv") is not None:
        cv = Table(state["cv"])
        scheme = cv.meta.pop("validation", "")
        cv.meta.clear()
        cvh = fits.table_to_hdu(cv)
        cvh.name = "CV"
        cvh.header["CVSCHEME"] = str(scheme)
        hdus.append(cvh)
    return hdus


def density_from_parts(parts):
    """Rebuild a :class:`~dustkit.density.DensityModel` from a file's extensions ``{name: (header, data)}``."""
    meta = json.loads(bytes(parts["STATE"][1]["JSON"][0]).decode() if isinstance(parts["STATE"][1]["JSON"][0], bytes)
                      else str(parts["STATE"][1]["JSON"][0]))
    arrays = {name[4:].lower(): np.asarray(data).astype(np.asarray(data).dtype.newbyteorder("="))
              for name, (_, data) in parts.items() if name.startswith("ARR_")}
    info = meta.get("tracer_info", {})
    tracers, _ = tracers_from_hdu(*parts["TRACERS"], law=info.get("law"), rv=info.get("rv"))
    cv = None
    if "CV" in parts:
        cv = Table(parts["CV"][1])
        cv.meta["validation"] = parts["CV"][0].get("CVSCHEME", "")
    state = {**meta, "arrays": arrays, "tracers": tracers, "cv": cv}  # tracers: the TracerSet itself
    state["grid"]["distance_edges"] = np.asarray(state["grid"]["distance_edges"], float)
    return density_from_state(state)


_STATE_ARRAYS = ("av_", "av_err_", "posterior_err_", "unresolved_", "prior_err_", "support_", "n_tracers_", "counts_",
                 "differential_", "samples_", "active_pixels_", "boost_", "pixel_length_", "mode_", "layer_err_")
#: The errors' prior (raised cells and their lengths); files written before it existed use the mode's.
_ERROR_PRIOR = ("error_boost_", "error_pixel_length_")
_STATE_SCALARS = ("amplitude_", "length_", "tau_", "structure_tau_", "isotropic_", "pull_left_", "error_amplitude_")


def _scalar(model, name):
    """A fitted scalar; models loaded from files written before it existed get its neutral value."""
    default = {"structure_tau_": 0.0, "isotropic_": 0.0, "pull_left_": 0.0,
               "error_amplitude_": getattr(model, "amplitude_", None)}.get(name)
    return float(getattr(model, name, default))


def density_state(model):
    """Everything a fitted :class:`DensityModel` needs to answer, as plain numbers and arrays."""
    model.check_fitted()
    g = model.grid_
    t = model.tracers_
    params = {k: v for k, v in model.get_params().items() if k not in ("quiet",)}
    params = {k: (np.asarray(getattr(v, "value", v), float).tolist() if k in ("distance_max", "distance_edges",
              "amplitudes", "lengths", "active_radius") and v is not None else v) for k, v in params.items()}
    if params.get("layer") is not None:  # a layer given instead of fitted, kept for refits (with_law)
        params["layer"] = given_layer(params["layer"]).state()
    return {
        "kind": "density",
        "params": params,
        "grid": {"nside": g.nside, "ordering": g.ordering, "distance_edges": g.distance_edges.copy()},
        "layer": model.layer_.state(),
        "scalars": {k: _scalar(model, k) for k in _STATE_SCALARS},
        "arrays": {**{k: np.asarray(getattr(model, k)) for k in _STATE_ARRAYS},
                   **{k: np.asarray(getattr(model, k, getattr(model, k.removeprefix("error_")))) for k in _ERROR_PRIOR}},
        "tracers": {k: np.asarray(getattr(t, k)) for k in ("l", "b", "distance", "distance_err", "av", "av_err", "name")},
        "tracer_info": {"law": t.law, "rv": float(t.rv)},
        "report": dict(getattr(model, "build_report_", {})),
        "cv": model.cv_.copy() if hasattr(model, "cv_") else None,
    }


def density_from_state(state):
    """Rebuild a fitted :class:`DensityModel` from :func:`density_state` output (answers bit for bit)."""

    p = dict(state["params"])
    if p.get("layer") is not None:
        p["layer"] = DustLayer.from_state(p["layer"])
    m = DensityModel(**{k: v for k, v in p.items() if k in DensityModel.param_names()})
    g = state["grid"]
    m.grid_ = Grid(int(g["nside"]), np.asarray(g["distance_edges"], float), g["ordering"])
    lay = state["layer"]
    m.layer_ = DustLayer.from_state(lay)
    for k, v in state["scalars"].items():
        setattr(m, k, float(v))
    for k, v in state["arrays"].items():
        setattr(m, k, np.asarray(v))
    m.tracers_ = tracer_set(state["tracers"], state["tracer_info"])  # from a file: as the catalogue gave them
    m.build_report_ = dict(state.get("report") or {})
    if state.get("cv") is not None:
        m.cv_ = state["cv"]
    return m
