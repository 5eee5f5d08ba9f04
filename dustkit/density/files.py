"""The FITS layout of a density model file (written and read through :mod:`dustkit.io`).

Extensions: ``SKYMODEL`` (full sky, HEALPix keywords PIXTYPE, ORDERING, COORDSYS, NSIDE,
INDXSCHM='IMPLICIT'; one row per pixel with ``AV`` and ``AV_ERR`` at every distance edge,
for readers of the convention), ``DISTANCE_EDGES``, ``STATE`` (the model's parameters, layer
and chosen hyperparameters as exact JSON), ``TRACERS``, ``CV`` and one image extension per
array the answers use (``ARR_AV_``, ``ARR_SAMPLES_``, ...), stored in their own dtype so a
loaded model answers bit for bit like the saved one, posterior draws included.
"""

import json

import numpy as np
from astropy.table import Table

from .estimator import density_from_state, density_state

__all__ = ["MODEL_KIND", "density_hdus", "density_from_parts"]

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
    tr = state["tracers"]
    names = np.char.encode(np.asarray(tr["name"]).astype(str), "utf-8")
    cols = [fits.Column(name="NAME", format=f"{max(1, names.dtype.itemsize)}A", array=names)]
    cols += [fits.Column(name=k.upper(), format="D", array=np.asarray(tr[k], float))
             for k in ("l", "b", "distance", "distance_err", "av", "av_err")]
    hdus = [sky, edges, st, fits.BinTableHDU.from_columns(cols, name="TRACERS")]
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
    trd = parts["TRACERS"][1]
    raw = np.asarray(trd["NAME"])
    tracers = {k: np.asarray(trd[k.upper()], float) for k in ("l", "b", "distance", "distance_err", "av", "av_err")}
    tracers["name"] = np.char.decode(raw, "utf-8", "replace") if raw.dtype.kind == "S" else raw.astype(str)
    cv = None
    if "CV" in parts:
        cv = Table(parts["CV"][1])
        cv.meta["validation"] = parts["CV"][0].get("CVSCHEME", "")
    state = {**meta, "arrays": arrays, "tracers": tracers, "cv": cv}
    state["grid"]["distance_edges"] = np.asarray(state["grid"]["distance_edges"], float)
    return density_from_state(state)
