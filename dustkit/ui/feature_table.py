"""The explorer's small table of dust features (HTML), one row per feature."""

import numpy as np
from astropy import units as u

__all__ = ["feature_table_html"]


def feature_table_html(features, density):
    """A small HTML table of features: id, l, b, distance +- error (or < upper), delta A_V +- error, probability."""
    from ..features import KIND_NEARER

    if len(features) == 0:
        return '<div style="font-size:90%">No dust feature passes the cut.</div>'
    names = features.colnames

    def val(row, col, unit):
        return float(row[col].to_value(unit)) if col in names and hasattr(row[col], "unit") else (
            float(row[col]) if col in names else float("nan"))

    head = ("<tr><th>#</th><th>l [°]</th><th>b [°]</th><th>distance [pc]</th><th>&Delta;A_V [mag]</th>"
            f"<th>{'P' if density else '&Delta;BIC'}</th></tr>")
    body = []
    for row in features:
        d, de = val(row, "distance", u.pc), val(row, "distance_err", u.pc)
        kind = str(row["kind"]) if "kind" in names else ""
        if kind == KIND_NEARER or not np.isfinite(d):
            dist = f"nearer than {val(row, 'distance_upper', u.pc):.0f}"
        else:
            dist = f"{d:.0f} &plusmn; {de:.0f}" if np.isfinite(de) else f"{d:.0f}"
        dav, dave = val(row, "delta_av", u.mag), val(row, "delta_av_err", u.mag)
        sig = val(row, "significance", u.one)
        body.append(f"<tr><td>{int(row['feature'])}</td><td>{val(row, 'l', u.deg):.2f}</td>"
                    f"<td>{val(row, 'b', u.deg):+.2f}</td><td>{dist}</td>"
                    f"<td>{dav:.2f} &plusmn; {dave:.2f}</td><td>{sig:.3f}</td></tr>")
    style = ('<style>.dustkit-ftab td,.dustkit-ftab th{padding:1px 5px;text-align:right;font-size:85%}</style>')
    return f'{style}<table class="dustkit-ftab">{head}{"".join(body)}</table>'
