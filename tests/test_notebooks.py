"""The worked notebooks in notebooks/ run top to bottom and produce what they promise.

Each notebook is copied into a temporary folder and executed there headless with nbclient
(the kernel is this interpreter, see the ``jupyter_env`` fixture in conftest.py), so the
notebooks must find the demo data through the installed package, not through relative
paths, and must write nothing into the repository. Files they write go to
``DUSTKIT_OUTPUT``, which the tests point at a temporary folder.
"""

import json
import re
import shutil
import struct
from pathlib import Path

import numpy as np
import pytest
from astropy import units as u
from astropy.table import QTable, Table

nbformat = pytest.importorskip("nbformat", reason="nbformat is needed to run the notebooks (pip install nbformat)")
nbclient = pytest.importorskip("nbclient", reason="nbclient is needed to run the notebooks (pip install nbclient)")

NOTEBOOKS = Path(__file__).resolve().parents[1] / "notebooks"
NAMES = ("explore_region.ipynb", "reddening_vs_distance.ipynb", "build_and_export.ipynb", "members_to_map.ipynb")


def _execute(name, tmp_path, monkeypatch, extra_cells=()):
    """Run notebook ``name`` in a fresh temporary working folder; return (notebook, output folder).

    ``extra_cells`` (code) run after the notebook's own cells, in its kernel, to look at what it drew.
    """
    work = tmp_path / "work"
    out = tmp_path / "out"
    work.mkdir()
    shutil.copy(NOTEBOOKS / name, work / name)
    monkeypatch.setenv("DUSTKIT_OUTPUT", str(out))
    nb = nbformat.read(work / name, as_version=4)
    nb.cells.extend(nbformat.v4.new_code_cell(code) for code in extra_cells)
    client = nbclient.NotebookClient(nb, timeout=300, kernel_name="python3",
                                     resources={"metadata": {"path": str(work)}})
    client.execute()  # raises CellExecutionError, with the cell and traceback, on any error
    assert sorted(p.name for p in work.iterdir()) == [name], "the notebook wrote into its working folder"
    return nb, out


def _stdout(nb):
    return "".join(o.get("text", "") for c in nb.cells if c.cell_type == "code"
                   for o in c.outputs if o.output_type == "stream" and o.name == "stdout")


def _markdown(nb):
    return "\n".join(c.source for c in nb.cells if c.cell_type == "markdown")


@pytest.mark.parametrize("name", NAMES)
def test_notebook_is_clean_and_cautions_the_reader(name):
    nb = nbformat.read(NOTEBOOKS / name, as_version=4)
    nbformat.validate(nb)
    # committed without outputs: small diffs, and no stale results that the code no longer makes
    assert all(not c.get("outputs") and c.get("execution_count") is None
               for c in nb.cells if c.cell_type == "code")
    text = _markdown(nb)
    assert "statistical" in text and "local data" in text  # the project's caution
    assert "invented" in text.lower()  # demo data are an invented scenario
    code = "\n".join(c.source for c in nb.cells if c.cell_type == "code")
    assert 'files("dustkit") / "data"' in code  # demo data through the package, from any folder
    assert "/work/" not in code and "data_demo" not in code


def test_explore_region_notebook(tmp_path, monkeypatch, jupyter_env):
    nb, _ = _execute("explore_region.ipynb", tmp_path, monkeypatch)

    # the explorer cell displays the panel as a widget
    bundles = [o["data"] for c in nb.cells if c.cell_type == "code" for o in c.outputs if "data" in o]
    assert any("application/vnd.jupyter.widget-view+json" in d for d in bundles)

    # the saved widget state holds the law chooser, the profile canvas and a status without error
    state = nb.metadata["widgets"]["application/vnd.jupyter.widget-state+json"]["state"]
    models = [m["state"] for m in state.values()]
    classes = [set(s.get("_dom_classes", ())) for s in models]
    assert any("dustkit-law" in c for c in classes)
    assert any("dustkit-profile" in c for c in classes)
    status = [s for s in models if "dustkit-status" in s.get("_dom_classes", ())]
    assert len(status) == 2  # the explorer of the binned model, and the one of the density model (dust features)
    for s in status:
        assert "dustkit-error" not in s["_dom_classes"]
        assert "Sight line l = 58.00" in s["value"]  # the cells moved the sight line
    assert sum("dustkit-feature-layer" in c for c in classes) == 2

    # A_V toward the invented Long Shadow cloud (1.6 kpc away) grows with distance, steeply across it
    rows = re.findall(r"A_V to ([\d.]+) kpc toward l = 58°, b = \+1°: ([\d.]+) \+- ([\d.]+) mag", _stdout(nb))
    assert [float(d) for d, _, _ in rows] == [1.0, 2.0, 3.0]
    av = np.array([float(a) for _, a, _ in rows])
    err = np.array([float(e) for _, _, e in rows])
    assert np.all(np.diff(av) > 0) and np.all(err > 0)
    assert av[1] - av[0] > 1.0  # the cloud adds 1.8 mag of A_V at its centre (data_demo/make_demo.py)


def _png_size(path):
    head = path.read_bytes()[:24]
    assert head[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, ISO/IEC 15948)
    return struct.unpack(">II", head[16:24])  # IHDR width, height


def test_reddening_vs_distance_notebook(tmp_path, monkeypatch, jupyter_env):
    nb, out = _execute("reddening_vs_distance.ipynb", tmp_path, monkeypatch)

    # exactly the two figure files: atomic saves leave no temporary files behind
    assert sorted(p.name for p in out.iterdir()) == ["reddening_vs_distance.pdf", "reddening_vs_distance.png"]
    assert (out / "reddening_vs_distance.pdf").read_bytes()[:5] == b"%PDF-"  # PDF header (ISO 32000-1, 7.5.2)
    # 7.1 x 3.2 inch (journal double-column width) at 300 dpi
    assert _png_size(out / "reddening_vs_distance.png") == (2130, 960)

    # the figure is shown once in the notebook, with both panels
    images = [o for c in nb.cells if c.cell_type == "code" for o in c.outputs
              if "data" in o and "image/png" in o["data"]]
    assert len(images) == 1
    assert "2 Axes" in images[0]["data"]["text/plain"]


def test_build_and_export_notebook(tmp_path, monkeypatch, jupyter_env):
    nb, out = _execute("build_and_export.ipynb", tmp_path, monkeypatch)
    assert sorted(p.name for p in out.iterdir()) == [
        "veyra_extinction_table.csv", "veyra_extinction_table.ecsv",
        "veyra_targets_extinction.csv", "veyra_targets_extinction.ecsv",
    ]

    # the binned table: one row per informed pixel and distance bin, with units and HEALPix metadata
    columns = ["pixel", "l", "b", "distance_min", "distance_max", "av_near", "av", "av_err",
               "differential", "n_tracers"]
    table = QTable.read(out / "veyra_extinction_table.ecsv", format="ascii.ecsv")
    assert table.colnames == columns
    assert table["av"].unit == u.mag and table["distance_max"].unit == u.pc
    assert table.meta["nside"] == 32 and table.meta["ordering"].lower() == "ring"
    assert len(table) > 0 and len(table) % 20 == 0  # 20 bins of 250 pc out to 5 kpc per pixel
    assert np.all(table["av"] >= table["av_near"])  # cumulative extinction never decreases
    assert np.all(table["av_err"] > 0 * u.mag)
    csv = Table.read(out / "veyra_extinction_table.csv", format="ascii.csv")
    assert csv.colnames == columns and len(csv) == len(table)

    # the target estimates: every input row and column kept, the row without distance left empty
    res = QTable.read(out / "veyra_targets_extinction.ecsv", format="ascii.ecsv")
    assert len(res) == 20
    for name in ("target", "ra", "dec", "dist_kpc", "priority",
                 "av", "av_err", "a_J", "a_J_err", "a_Ks", "a_Ks_err"):
        assert name in res.colnames
    missing = np.asarray(res["target"]) == "VF-T07"  # the demo target without a distance
    av = res["av"].to_value(u.mag)
    assert np.all(np.isnan(av[missing])) and np.all(np.isfinite(av[~missing]))
    assert np.all(res["av_err"][~missing] > 0 * u.mag)
    # band extinction through the law: CCM89 infrared branch (Cardelli, Clayton & Mathis 1989,
    # ApJ 345, 245, eqs. 2a-2b): a = 0.574 x^1.61, b = -0.527 x^1.61, A/A_V = a + b / R_V.
    # R_V = 3.1 at the 2MASS isophotal wavelengths (Cohen et al. 2003, from memory):
    # J (1.235 um) 0.2876, Ks (2.159 um) 0.1170. The answers integrate over the 2MASS
    # passbands, which agree with these within 0.01 (narrow bands).
    assert res.meta["law"] == "ccm89" and res.meta["rv"] == pytest.approx(3.1)
    ratio_j = (res["a_J"] / res["av"]).to_value(u.one)[~missing]
    ratio_ks = (res["a_Ks"] / res["av"]).to_value(u.one)[~missing]
    np.testing.assert_allclose(ratio_j, 0.2876, atol=0.01)
    np.testing.assert_allclose(ratio_ks, 0.1170, atol=0.01)
    assert "statistical" in res.meta["caution"]
    csv = Table.read(out / "veyra_targets_extinction.csv", format="ascii.csv")
    np.testing.assert_allclose(np.asarray(csv["av"], float), av, equal_nan=True)  # full precision in CSV too

    # the notebook's own check against the invented truth ran and printed its verdict
    assert re.search(r"median \|model - truth\| = [\d.]+ mag; \d+% of targets within 1 sigma", _stdout(nb))


# after the notebook: where the fitted cluster's marker sits on the profile figure of section 4
_CLUSTER_MARKER = """
import json as _json
_marker = ax.containers[-1].lines[0]  # the last error bar drawn: the cluster of the main-sequence fit
print("MARKER", _json.dumps({"x": float(_marker.get_xdata()[0]), "y": float(_marker.get_ydata()[0]),
                             "xlim": [float(v) for v in ax.get_xlim()], "xlabel": ax.get_xlabel(),
                             "distance_pc": float(row["distance_pc"]), "av": float(model.rv * row["ebv"])}))
"""


def test_members_to_map_notebook(tmp_path, monkeypatch, jupyter_env):
    nb, out = _execute("members_to_map.ipynb", tmp_path, monkeypatch, extra_cells=[_CLUSTER_MARKER])
    text = _stdout(nb)
    # the six invented clusters are fitted, compared with their invented truth, and joined to a model
    assert text.count("(truth") >= 12 and "Veyra Lantern" in text
    assert "ebv_mu0_degenerate" in text  # the lone B, V diagram is flagged
    fits = Table.read(out / "member_fits.ecsv")
    assert len(fits) == 6 and {"mu0", "mu0_err", "ebv_mu0_corr", "distance_pc"} <= set(fits.colnames)
    assert "model at the cluster: A_V" in text
    # the cluster is drawn where it is, in the unit of the profile's distance axis, inside the axes
    # (it was once drawn at its distance in pc on an axis in kpc: far off the figure)
    marker = json.loads(re.search(r"^MARKER (.*)$", text, re.M).group(1))
    unit = re.search(r"\[(pc|kpc)\]", marker["xlabel"]).group(1)
    assert marker["x"] == pytest.approx(marker["distance_pc"] / (1000.0 if unit == "kpc" else 1.0))
    assert marker["xlim"][0] <= marker["x"] <= marker["xlim"][1]
    assert marker["y"] == pytest.approx(marker["av"])
