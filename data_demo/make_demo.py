"""Generate dustkit's demo data: the invented Veyra Field.

Everything here is invented: the field, its dust clouds, its clusters and the targets.
No real object or catalogue is used. The parameters are documented in README.md beside
this script; change them here and run

    python data_demo/make_demo.py

to rewrite the demo files in data_demo/ and their packaged copies in dustkit/data/
(the ``dustkit demo`` command reads the packaged copies, so it works from any install).
The output is deterministic (fixed random seed).
"""

import json
import sys
from pathlib import Path

import numpy as np
from astropy import units as u
from astropy.coordinates import SkyCoord
from astropy.table import Table

from dustkit.simulate import Cloud, DustField, simulate_tracers

HERE = Path(__file__).resolve().parent
PACKAGE_DATA = HERE.parent / "dustkit" / "data"

CATALOGUE = "veyra_clusters.csv"
TARGETS = "veyra_targets.csv"
FIELD = "veyra_field.json"
MEMBERS = "veyra_members.csv"
MEMBERS_TRUTH = "veyra_members_truth.json"

SEED = 2026
N_CLUSTERS = 400
L_RANGE = (20.0, 80.0)    # deg
B_RANGE = (-10.0, 10.0)   # deg
DISTANCE_RANGE = (100.0, 4000.0)  # pc
CLUSTER_SCALE_HEIGHT = 80.0  # pc, of the clusters' own disc
DISTANCE_FRAC_ERR = (0.08, 0.15)
EBV_ERR = (0.02, 0.05)  # mag
RV = 3.1

#: The invented dust: an exponential layer plus five named clouds.
LAYER = {"a0": 1.1, "h": 115.0, "z_sun": 18.0}  # mag/kpc, pc, pc
CLOUDS = {  # name: (l deg, b deg, distance pc, angular sigma deg, depth sigma pc, A_V through centre mag)
    "Veyra Veil": (32.0, 2.0, 450.0, 3.0, 25.0, 1.4),
    "Ashen Knot": (47.0, -3.5, 900.0, 2.5, 40.0, 1.0),
    "Long Shadow": (58.0, 1.0, 1600.0, 4.0, 60.0, 1.8),
    "Tamsin Cloud": (69.0, 4.5, 700.0, 2.0, 30.0, 0.8),
    "Far Drift": (75.0, -1.5, 2400.0, 3.5, 80.0, 1.2),
}

#: Deliberately bad rows (cluster number -> what is wrong), so the demo shows rejected rows.
BAD_ROWS = {
    57: "E(B-V) missing",
    123: "latitude typed as 95.2 (|b| > 90)",
    208: "distance given as -1 (a placeholder for unknown)",
    311: "distance written as text '~1200'",
}


def dust_field():
    """The invented Veyra Field as a :class:`dustkit.simulate.DustField`."""
    return DustField(
        a0=LAYER["a0"], h=LAYER["h"], z_sun=LAYER["z_sun"],
        clouds=tuple(Cloud(*p) for p in CLOUDS.values()),
    )


def make_catalogue(field):
    sim = simulate_tracers(
        field, N_CLUSTERS, l_range=L_RANGE, b_range=B_RANGE,
        distance_min=DISTANCE_RANGE[0], distance_max=DISTANCE_RANGE[1],
        scale_height=CLUSTER_SCALE_HEIGHT, distance_frac_err=DISTANCE_FRAC_ERR,
        ebv_err=EBV_ERR, rv=RV, name_prefix="Veyra", rng=SEED,
    )
    rng = np.random.default_rng(SEED + 1)
    t = Table()
    t["cluster"] = sim["name"]
    t["GLON"] = np.round(np.asarray(sim["l"]), 4)
    t["GLAT"] = np.round(np.asarray(sim["b"]), 4)
    dist = np.round(np.asarray(sim["distance"])).astype(int).astype(str)
    t["e_dist_pc"] = np.round(np.asarray(sim["distance_err"])).astype(int)
    t["E(B-V)"] = np.round(np.asarray(sim["ebv"]), 3).astype(str)
    t["e_E(B-V)"] = np.round(np.asarray(sim["ebv_err"]), 3)
    t["n_members"] = rng.integers(12, 400, len(t))
    dist = dist.astype("U8")
    ebv = np.asarray(t["E(B-V)"]).astype("U8")
    glat = np.asarray(t["GLAT"], float)
    ebv[57 - 1] = ""
    glat[123 - 1] = 95.2
    dist[208 - 1] = "-1"
    dist[311 - 1] = "~1200"
    t["GLAT"] = glat
    t["E(B-V)"] = ebv
    t.add_column(dist, name="dist_pc", index=3)
    return t, sim


#: Invented clusters with member photometry (name: l deg, b deg, distance pc, photometry).
#: Their E(B-V) is the invented field's A_V to that distance / R_V.
MEMBER_CLUSTERS = {
    "Veyra Lantern": (31.0, 1.5, 700.0, "UBV"),
    "Veyra Quill": (46.5, -3.0, 1300.0, "UBV"),
    "Veyra Harrow": (57.0, 0.5, 2100.0, "UBV"),
    "Veyra Sable": (33.5, 2.5, 350.0, "Gaia+2MASS"),
    "Veyra Tessel": (59.0, 1.8, 1200.0, "Gaia+2MASS"),
    "Veyra Corrie": (69.5, 4.0, 1000.0, "Gaia+2MASS"),
}
MEMBERS_PER_CLUSTER = 60
_GAIA_COLUMNS = {"G": "Gmag", "BP": "BPmag", "RP": "RPmag", "J": "Jmag", "Ks": "Ksmag"}


def make_members(field):
    """Invented member photometry (with 30% binaries and 30% field stars) of MEMBER_CLUSTERS."""
    from dustkit.clusters import simulate_members

    rng = np.random.default_rng(SEED + 3)
    tables, truth = [], {}
    for name, (l, b, d, system) in MEMBER_CLUSTERS.items():
        av = float(field.av(np.array([l]), np.array([b]), np.array([d]))[0])
        ebv = round(av / RV, 3)
        mu0 = 5 * np.log10(d) - 5
        bands = ("U", "B", "V") if system == "UBV" else ("G", "BP", "RP", "J", "Ks")
        t = simulate_members(MEMBERS_PER_CLUSTER, ebv, mu0, bands=bands, rv=RV, l=l, b=b, rng=rng,
                             parallax_error=None if system == "UBV" else 0.04,
                             n_evolved=3 if system == "UBV" else 0)
        out = Table()
        out["cluster"] = [name] * len(t)
        out["l"], out["b"] = t["l"], t["b"]
        for band in ("U", "B", "V", "G", "BP", "RP", "J", "Ks"):
            col = band if band in ("U", "B", "V") else _GAIA_COLUMNS[band]
            if band in bands:
                out[col] = t[band]
                out[f"e_{col}"] = t[f"e_{band}"]
            else:
                out[col] = np.full(len(t), np.nan)
                out[f"e_{col}"] = np.full(len(t), np.nan)
        if "parallax" in t.colnames:
            # the catalogue's parallaxes are too small by an invented zero point of 0.017 mas
            out["parallax"] = np.round(t["parallax"] - 0.017, 4)
            out["parallax_error"] = t["parallax_error"]
        else:
            out["parallax"] = np.full(len(t), np.nan)
            out["parallax_error"] = np.full(len(t), np.nan)
        tables.append(out)
        truth[name] = {"l": l, "b": b, "distance": d, "mu0": round(float(mu0), 4), "ebv": ebv, "photometry": system,
                       "n_rows": len(t), "n_true_members": int(np.count_nonzero(t["true_member"]))}
    from astropy.table import vstack

    members = vstack(tables, metadata_conflicts="silent")
    members.meta = {}
    return members, truth


def make_targets(field):
    rng = np.random.default_rng(SEED + 2)
    n = 20
    l = rng.uniform(L_RANGE[0] + 2, L_RANGE[1] - 2, n)
    b = rng.uniform(-6.0, 6.0, n)
    # two targets deliberately outside the clusters' field: the model falls back to the layer there
    l[-2], b[-2] = 110.0, 3.0
    l[-1], b[-1] = 40.0, 35.0
    d_kpc = np.round(rng.uniform(0.3, 3.5, n), 2)
    c = SkyCoord(l=l * u.deg, b=b * u.deg, frame="galactic").icrs
    t = Table()
    t["target"] = [f"VF-T{i + 1:02d}" for i in range(n)]
    t["ra"] = np.round(c.ra.deg, 5)
    t["dec"] = np.round(c.dec.deg, 5)
    dist = d_kpc.astype(str).astype("U8")
    dist[6] = ""  # one target without a distance: its extinction columns stay empty
    t["dist_kpc"] = dist
    t["priority"] = rng.choice(["high", "normal", "low"], n)
    return t, d_kpc


def main(out_dirs=(HERE, PACKAGE_DATA)):
    field = dust_field()
    cat, _ = make_catalogue(field)
    targets, _ = make_targets(field)
    info = {
        "description": "The Veyra Field: an invented dust field for dustkit's demo. Not a real region.",
        "layer": LAYER,
        "clouds": {k: dict(zip(("l", "b", "distance", "radius", "depth", "av"), v)) for k, v in CLOUDS.items()},
        "units": {"a0": "mag/kpc", "h": "pc", "z_sun": "pc", "l": "deg", "b": "deg", "distance": "pc",
                  "radius": "deg", "depth": "pc", "av": "mag"},
        "rv": RV,
        "seed": SEED,
    }
    members, members_truth = make_members(field)
    members_info = {
        "description": "Invented clusters of the Veyra Field with member photometry (dustkit demo). Not real objects.",
        "clusters": members_truth,
        "units": {"l": "deg", "b": "deg", "distance": "pc", "mu0": "mag", "ebv": "mag"},
        "binary_fraction": 0.3, "field_fraction": 0.3, "parallax_zero_point_mas": -0.017, "rv": RV,
    }
    for folder in out_dirs:
        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        cat.write(folder / CATALOGUE, format="ascii.csv", overwrite=True)
        targets.write(folder / TARGETS, format="ascii.csv", overwrite=True)
        (folder / FIELD).write_text(json.dumps(info, indent=1) + "\n")
        members.write(folder / MEMBERS, format="ascii.csv", overwrite=True)
        (folder / MEMBERS_TRUTH).write_text(json.dumps(members_info, indent=1) + "\n")
        print(f"wrote {folder / CATALOGUE} ({len(cat)} clusters), {folder / TARGETS} ({len(targets)} targets), "
              f"{folder / FIELD}")


if __name__ == "__main__":
    main(sys.argv[1:] or (HERE, PACKAGE_DATA))
