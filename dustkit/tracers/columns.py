"""Column recognition: which column holds which role (see the package docstring for spellings)."""

import re

from ..exceptions import AssumptionWarning, CatalogError
from .._lib.validation import param_error
from .reddening import EXCESS_NAME, REDDENING_LIKE, intrinsic_color_bands, is_bv, parse_color_name

__all__ = [
    "COLUMN_KEYS",
    "NAME_ALIASES",
    "GALACTIC_PAIRS",
    "EQUATORIAL_PAIRS",
    "VALUE_ALIASES",
    "recognised_column",
    "DISTANCE_LIKE",
    "KIND_LABEL",
    "norm",
    "resolve_columns",
]


#: Keys accepted by the ``columns=`` mapping.
COLUMN_KEYS = (
    "ebv_mu0_corr",
    "name",
    "l",
    "b",
    "ra",
    "dec",
    "distance",
    "distance_err",
    "distance_modulus",
    "distance_modulus_err",
    "apparent_modulus",
    "apparent_modulus_err",
    "parallax",
    "parallax_err",
    "ebv",
    "ebv_err",
    "av",
    "av_err",
    "excess",
    "excess_err",
    "temperature",
    "intrinsic_color",
)


NAME_ALIASES = [
    "name", "id", "cluster", "clustername", "clname", "object", "objname", "objectname",
    "star", "starname", "sourceid", "source", "designation", "identifier", "mainid", "target",
]


GALACTIC_PAIRS = [  # specific spellings first: a lone 'b' may be a B magnitude
    ("glon", "glat"), ("lii", "bii"), ("gall", "galb"), ("glondeg", "glatdeg"),
    ("galacticlongitude", "galacticlatitude"), ("galon", "galat"), ("ldeg", "bdeg"), ("l", "b"),
]


EQUATORIAL_PAIRS = [
    ("ra", "dec"), ("ra", "de"), ("raj2000", "dej2000"), ("raj2000", "decj2000"),
    ("raicrs", "deicrs"), ("raicrs", "decicrs"), ("radeg", "dedeg"), ("radeg", "decdeg"),
    ("rightascension", "declination"), ("raj2000deg", "dej2000deg"),
    # FK4 B1950 (read in that frame, values.equatorial_frame), after every J2000/ICRS pair
    ("rab1950", "deb1950"), ("rab1950", "decb1950"), ("ra1950", "dec1950"), ("ra1950", "de1950"),
]


VALUE_ALIASES = {
    "distance": [
        "distance", "dist", "d", "dis", "distpc", "distkpc", "distancepc", "distancekpc",
        "dpc", "dkpc", "dispc", "diskpc",
    ],
    "distance_modulus": [
        "mu0", "mm0", "dm0", "dmod0", "distmod0", "truemodulus", "truedistancemodulus", "mmo",
    ],
    "apparent_modulus": [
        "apparentmodulus", "apparentdistancemodulus", "apparentvmodulus", "apparentmodulusv",
        "appmod", "mmv", "dmv", "muv", "dmodv", "distmodv",
    ],
    # names that do not say whether the modulus is true or apparent: read only with distance_modulus_kind
    "modulus": ["distancemodulus", "distmod", "dmod", "dm", "modulus"],
    "parallax": ["parallax", "plx", "pi", "varpi", "parallaxmas", "plxmas"],
    "ebv": ["ebv", "ebmv", "ebminusv", "reddening", "ebvmag"],
    "av": ["av", "extinctionv", "extv", "avmag", "av0"],
    # the source star, for colour excesses converted through passbands ('log...' names: log10 K)
    "temperature": [
        "teff", "temperature", "tempk", "teffk", "tstar", "effectivetemperature", "sourcetemperature",
        "startemperature", "temp", "teffgspphot", "teffgspspec", "teffval", "teffesphs",
        "logteff", "logtemperature", "lgteff",
    ],
}


_ERROR_PREFIX = re.compile(r"^e_")  # case-sensitive: 'E_BV' is a value, 'e_BV' an error


_ERROR_WORD = re.compile(r"(^(err|error|sigma|sig|unc)_)|(_(err|error|sigma|sig|unc)$)", re.I)


DISTANCE_LIKE = ("distance", "distance_modulus", "parallax", "apparent_modulus")


KIND_LABEL = {
    "distance": "distance",
    "distance_modulus": "distance modulus",
    "apparent_modulus": "apparent V modulus",
    "parallax": "parallax",
}


def norm(name):
    return re.sub(r"[^a-z0-9]", "", str(name).lower())


def _spellings(role):
    if role in VALUE_ALIASES:
        return ", ".join(VALUE_ALIASES[role][:6])
    if role in ("l", "b"):
        return ", ".join("/".join(p) for p in [GALACTIC_PAIRS[-1]] + GALACTIC_PAIRS[:3])
    if role in ("ra", "dec"):
        return ", ".join("/".join(p) for p in EQUATORIAL_PAIRS[:5])
    return ""


def _found_text(table):
    names = table.colnames
    shown = ", ".join(repr(c) for c in names[:40])
    return shown + (f" and {len(names) - 40} more" if len(names) > 40 else "")


def resolve_columns(table, columns, ctx, want_reddening=True):
    """Map roles to column names: explicit mapping first, then recognised spellings."""
    explicit = _explicit_columns(table, columns, ctx, want_reddening)
    names = list(table.colnames)
    finder = _Finder(names, explicit)
    cols = _position_columns(table, explicit, finder, ctx)
    used = set(cols.values()) | set(explicit.values())
    _distance_column(table, explicit, finder, ctx, want_reddening, cols, used)
    used |= set(cols.values())
    if want_reddening:
        _reddening_column(table, explicit, finder, ctx, cols, used)
        used |= set(cols.values())
        _star_column(explicit, finder, ctx, cols, used)
        used |= set(cols.values())
        rv_col = finder.find(["rv"], used)
        if rv_col is not None:
            ctx.note(
                AssumptionWarning,
                f"Column {rv_col!r} looks like a per-row R_V; it is not used: every row is converted to A_V with "
                "the one R_V of the read (rv=, command line --rv). Hint: read rows of different R_V separately.",
            )
    else:  # targets: the star of their band extinctions (reader.target_temperatures), when named
        for key in ("temperature", "intrinsic_color"):
            if key in explicit:
                cols[key] = explicit[key]
                break
    if "name" in explicit:
        cols["name"] = explicit["name"]
    elif isinstance(columns, dict) and "name" in columns and columns["name"] is None:
        pass  # columns={'name': None}: no name column (rows are 'row <i>'; none is one tracer by name)
    else:
        c = finder.find(NAME_ALIASES, used)
        if c is not None:
            cols["name"] = c
    used |= set(cols.values())
    _error_columns(names, explicit, cols, used)
    _second_of_a_name(names, cols, explicit, ctx)
    ctx.used = dict(cols)
    return cols


def _second_of_a_name(names, cols, explicit, ctx):
    """Announce a used column beside one named as readers name a second column of the same name ('EBV_1'
    by astropy, 'EBV.1' by pandas): a header that names a column twice gives no way to tell them apart."""
    for role, c in cols.items():
        twins = [t for t in (f"{c}_1", f"{c}.1") if t in names and t not in cols.values()]
        if twins and role not in explicit:
            ctx.note(AssumptionWarning, f"Column {c!r} is read as {role}, and a column {twins[0]!r} is also present, "
                     f"the name a reader gives a second column called {c!r}: if the header names {c!r} twice, the "
                     f"first is used. Hint: rename one, or choose with columns={{'{role}': {twins[0]!r}}}.")


class _Finder:
    """Recognised spellings among the columns that are neither explicit nor error columns."""

    def __init__(self, names, explicit):
        taken = set(explicit.values())
        self.candidates = [c for c in names if c not in taken and not _looks_like_error(c, names)]
        self.by_norm = {}
        for c in self.candidates:
            self.by_norm.setdefault(norm(c), c)

    def find(self, aliases, exclude=()):
        for a in aliases:
            c = self.by_norm.get(a)
            if c is not None and c not in exclude:
                return c
        return None

    def find_colour(self, exclude=()):
        """The first intrinsic-colour column (``(BP-RP)_0``, ``bp_rp0``, ...; :func:`intrinsic_color_bands`)."""
        return next((c for c in self.candidates if c not in exclude and intrinsic_color_bands(c) is not None), None)


def recognised_column(names, role, exclude=()):
    """The first of ``names`` that is a recognised spelling of ``role`` (``VALUE_ALIASES``; for
    ``"intrinsic_color"`` a colour name with an intrinsic mark), error columns and ``exclude`` aside,
    as :func:`resolve_columns` finds it; None if there is none."""
    finder = _Finder(list(names), {})
    if role == "intrinsic_color":
        return finder.find_colour(exclude)
    return finder.find(VALUE_ALIASES[role], exclude)


def _explicit_columns(table, columns, ctx, want_reddening):
    """The ``columns=`` mapping checked against the table: role -> column name as in the table."""
    if columns is None:
        columns = {}
    if not isinstance(columns, dict):
        raise param_error("columns", "a dict mapping roles to column names, e.g. {'ebv': 'E_BV'}", columns)
    names = list(table.colnames)
    lower = {}
    for c in names:
        lower.setdefault(c.lower(), c)
    explicit = {}
    for key, col in columns.items():
        if key not in COLUMN_KEYS:
            raise param_error("columns", f"a dict whose keys are among {', '.join(COLUMN_KEYS)}", key)
        if key == "name" and col is None:  # read without names (see resolve_columns)
            continue
        if col in names:
            explicit[key] = col
        elif isinstance(col, str) and col.lower() in lower:
            explicit[key] = lower[col.lower()]
        else:
            raise CatalogError(
                f"columns={{{key!r}: {col!r}}} names a column that is not in {ctx.desc}. "
                f"Columns found: {_found_text(table)}."
            )
    if not want_reddening:
        for key in REDDENING_LIKE + ("apparent_modulus",):
            if key in explicit:
                what = (
                    "An apparent modulus cannot place a target: turning it into a distance needs the "
                    "reddening, which is what is being estimated. Give a distance, a true distance modulus "
                    "or a parallax instead."
                    if key == "apparent_modulus"
                    else "Targets need positions and distances only; reddening columns are not used."
                )
                raise CatalogError(f"columns={{{key!r}: {explicit[key]!r}}}: {what}")

    return explicit


def _position_columns(table, explicit, finder, ctx):
    """``l``/``b`` or ``ra``/``dec``: the explicit pair (completed by recognition) or the first pair found."""
    by_norm = finder.by_norm
    cols = {}
    pos_keys = [k for k in ("l", "b", "ra", "dec") if k in explicit]
    if pos_keys:
        gal = any(k in explicit for k in ("l", "b"))
        equ = any(k in explicit for k in ("ra", "dec"))
        if gal and equ:
            raise CatalogError(
                "columns= names both Galactic (l/b) and equatorial (ra/dec) columns; give one pair."
            )
        pair, pairs = (("l", "b"), GALACTIC_PAIRS) if gal else (("ra", "dec"), EQUATORIAL_PAIRS)
        for i, k in enumerate(pair):
            if k in explicit:
                cols[k] = explicit[k]
            else:
                c = finder.find([p[i] for p in pairs], exclude=set(explicit.values()))
                if c is None:
                    raise CatalogError(
                        f"columns= names {pair[1 - i]!r} but no {k!r} column was found in {ctx.desc}. "
                        f"Columns found: {_found_text(table)}. Hint: add {k!r} to columns=."
                    )
                cols[k] = c
    else:
        chosen = None
        for system, pairs in (("galactic", GALACTIC_PAIRS), ("icrs", EQUATORIAL_PAIRS)):
            for pl, pb in pairs:
                if pl in by_norm and pb in by_norm:
                    chosen = (system, by_norm[pl], by_norm[pb])
                    break
            if chosen:
                break
        if chosen is None:
            raise CatalogError(
                f"No position columns found in {ctx.desc}. Columns found: {_found_text(table)}. "
                f"Needed: Galactic longitude/latitude in deg (spellings: {_spellings('l')}, ...) or ICRS "
                f"ra/dec in deg or sexagesimal (spellings: {_spellings('ra')}, ...). "
                "Hint: name them explicitly, e.g. columns={'l': 'LON', 'b': 'LAT'}."
            )
        system, c1, c2 = chosen
        if system == "galactic":
            cols["l"], cols["b"] = c1, c2
            other = [(by_norm[p], by_norm[q]) for p, q in EQUATORIAL_PAIRS if p in by_norm and q in by_norm]
            if other:
                ctx.assumptions.append(
                    f"Galactic columns ({c1!r}, {c2!r}) used; equatorial columns {other[0]!r} also present, not used"
                )
        else:
            cols["ra"], cols["dec"] = c1, c2
    return cols


def _distance_column(table, explicit, finder, ctx, want_reddening, cols, used):
    """Add the one distance-like column (distance, modulus, parallax) to ``cols``."""
    find = finder.find
    exp_dist = [k for k in DISTANCE_LIKE if k in explicit]
    if len(exp_dist) > 1:
        raise CatalogError(
            f"columns= names several distance columns ({', '.join(exp_dist)}); give only one of "
            "distance, distance_modulus, parallax, apparent_modulus."
        )
    kinds = DISTANCE_LIKE if want_reddening else ("distance", "distance_modulus", "parallax")
    if exp_dist:
        cols[exp_dist[0]] = explicit[exp_dist[0]]
    else:
        found = [(k, find(VALUE_ALIASES[k], used)) for k in kinds]
        ambiguous = find(VALUE_ALIASES["modulus"], used)
        if ambiguous is not None and not any(c for k, c in found if k != "distance" and c is not None):
            kind = getattr(ctx, "modulus_kind", None)
            if kind is None and not any(c for _, c in found):
                raise CatalogError(
                    f"Column {ambiguous!r} in {ctx.desc} is a distance modulus, but its name does not say whether "
                    "it is the true modulus mu0 or the apparent V modulus (m-M)_V = mu0 + A_V (at E(B-V) = 1.5 "
                    "the two differ by a factor 8.5 in distance). Hint: pass distance_modulus_kind='true' or "
                    "'apparent' (command line: --modulus-kind true|apparent), or name the column explicitly, "
                    "e.g. columns={'distance_modulus': ...} or columns={'apparent_modulus': ...}."
                )
            if kind is not None:
                role = "distance_modulus" if kind == "true" else "apparent_modulus"
                if role in kinds:
                    found = [(k, ambiguous if k == role else c) for k, c in found]
                    ctx.assumptions.append(
                        f"modulus column {ambiguous!r} read as the "
                        f"{'true modulus mu0' if kind == 'true' else 'apparent V modulus (m-M)_V'} "
                        f"(distance_modulus_kind={kind!r})"
                    )
                else:
                    found = [(k, c) for k, c in found]  # the apparent modulus cannot place a target
                    if not any(c for _, c in found):
                        raise CatalogError(
                            f"The only distance-like column in {ctx.desc} is {ambiguous!r}, read as an apparent V "
                            "modulus (distance_modulus_kind='apparent'). It cannot place a target: turning it into "
                            "a distance needs the reddening, which is what is being estimated. Hint: give a "
                            "distance, a true distance modulus or a parallax column."
                        )
        found = [(k, c) for k, c in found if c is not None]
        if not found:
            if not want_reddening and find(VALUE_ALIASES["apparent_modulus"], used):
                c = find(VALUE_ALIASES["apparent_modulus"], used)
                raise CatalogError(
                    f"The only distance-like column in {ctx.desc} is {c!r}, an apparent V modulus. It cannot "
                    "place a target: turning it into a distance needs the reddening, which is what is being "
                    "estimated. Hint: give a distance, a true distance modulus or a parallax column."
                )
            raise CatalogError(
                f"No distance column found in {ctx.desc}. Columns found: {_found_text(table)}. Needed one of: "
                + "; ".join(f"{KIND_LABEL[k]} ({_spellings(k)}, ...)" for k in kinds)
                + ". Hint: name it explicitly, e.g. columns={'distance': 'Dist'} (and distance_unit='kpc' if so)."
            )
        cols[found[0][0]] = found[0][1]
        if len(found) > 1:
            ctx.note(
                AssumptionWarning,
                "Several distance columns found: "
                + ", ".join(f"{c!r} ({KIND_LABEL[k]})" for k, c in found)
                + f"; using {found[0][1]!r}. Pass columns={{'{found[0][0]}': ...}} (or another key) to choose.",
            )


def _reddening_column(table, explicit, finder, ctx, cols, used):
    """Add the one reddening column (E(B-V), A_V or another colour excess) to ``cols``."""
    find, candidates = finder.find, finder.candidates
    exp_red = [k for k in REDDENING_LIKE if k in explicit]
    if len(exp_red) > 1:
        raise CatalogError(
            f"columns= names several reddening columns ({', '.join(exp_red)}); give only one of ebv, av, excess."
        )
    if exp_red:
        cols[exp_red[0]] = explicit[exp_red[0]]
    else:
        found = [(k, find(VALUE_ALIASES[k], used)) for k in ("ebv", "av")]
        found_cols = {c for _, c in found}
        exc = [
            c
            for c in candidates
            if c not in used and c not in found_cols
            and (EXCESS_NAME.match(c) or (c[:2] in ("E(", "E[") and parse_color_name(c) is not None))
            and not is_bv(parse_color_name(c))
        ]
        if exc:
            found.append(("excess", exc[0]))
        found = [(k, c) for k, c in found if c is not None]
        if not found:
            raise CatalogError(
                f"No reddening column found in {ctx.desc}. Columns found: {_found_text(table)}. Needed one of: "
                f"E(B-V) ({_spellings('ebv')}, ...); A_V ({_spellings('av')}, ...); another colour excess "
                "named like E(BP-RP) or E_J_Ks. Hint: name it explicitly, e.g. columns={'ebv': 'Red'} or "
                "columns={'excess': 'EBR'}, excess_color=('BP', 'RP')."
            )
        cols[found[0][0]] = found[0][1]
        if len(found) > 1:
            ctx.note(
                AssumptionWarning,
                "Several reddening columns found: "
                + ", ".join(f"{c!r}" for k, c in found)
                + f"; using {found[0][1]!r}. Pass columns={{'ebv': ...}}, {{'av': ...}} or {{'excess': ...}} to choose.",
            )


def _star_column(explicit, finder, ctx, cols, used):
    """Add the source star's temperature or intrinsic colour column, if any (explicit first)."""
    for key in ("temperature", "intrinsic_color"):
        if key in explicit:
            cols[key] = explicit[key]
            return
    c = finder.find(VALUE_ALIASES["temperature"], used)
    colour = finder.find_colour(used)
    if c is not None:
        cols["temperature"] = c
        if colour is not None:
            ctx.assumptions.append(f"temperature column {c!r} used for the source star; intrinsic colour "
                                   f"{colour!r} also present, not used")
    elif colour is not None:
        cols["intrinsic_color"] = colour


def _error_columns(names, explicit, cols, used):
    """Add the error column of every value column found (explicit ``*_err`` keys first)."""
    for role in list(cols):
        if role in ("name", "l", "b", "ra", "dec", "temperature", "intrinsic_color"):
            continue
        key = f"{role}_err"
        if key in explicit:
            cols[key] = explicit[key]
            continue
        pair = _find_error_pair(names, cols[role], role, used)
        if pair is not None:
            cols[key + "_low"], cols[key + "_high"] = pair
            used.update(pair)
            continue
        c = _find_error(names, cols[role], role, used)
        if c is not None:
            cols[key] = c
            used.add(c)
    for key, col in explicit.items():  # stray explicit *_err for an unused role
        if key.endswith("_err") and key[:-4] not in cols:
            raise CatalogError(
                f"columns={{{key!r}: {col!r}}} gives the error of {key[:-4]!r}, but {key[:-4]!r} is not the "
                f"column being used (using: {', '.join(f'{k}={v!r}' for k, v in cols.items())})."
            )

def _looks_like_error(colname, names):
    """True for error-column names: 'e_X', 'err_X', 'X_err', 'sigma_X', ..., and 'eX' when 'X' is a column."""
    if _ERROR_PREFIX.search(colname) or _ERROR_WORD.search(colname):
        return True
    return len(colname) > 1 and colname[0] == "e" and colname[1].isupper() and colname[1:] in names


#: Words that mark an error column as relative to its value (a percentage or a fraction, read by
#: ``values.relative_error_factor``), tried after the plain spellings: 'dist_err_pct', 'e_Dist_percent'.
_RELATIVE_MARKS = ("pct", "percent", "frac", "rel")
#: Words that mark the lower and the upper error of a pair: 'dist_err_lo'/'dist_err_hi', 'ebv_errminus'/...
_LOWER_MARKS = ("lo", "low", "lower", "minus", "neg", "down")
_UPPER_MARKS = ("hi", "high", "upper", "plus", "pos", "up")


def _error_spellings(base):
    return (
        "e" + base, base + "err", "err" + base, "error" + base, "sigma" + base, "sig" + base,
        base + "error", base + "sigma", base + "unc", "unc" + base,
    )


def _by_norm(names, value_col, used):
    by_norm = {}
    for c in names:
        if c not in used and c != value_col:
            by_norm.setdefault(norm(c), c)
    return by_norm


def _bases(value_col, role):
    return [norm(value_col)] + [a for a in VALUE_ALIASES.get(role, []) if a != norm(value_col)]


def _find_error(names, value_col, role, used):
    by_norm = _by_norm(names, value_col, used)
    bases = _bases(value_col, role)
    for base in bases:
        for cand in _error_spellings(base):
            c = by_norm.get(cand)
            if c is not None:
                return c
    for base in bases:  # relative errors: 'dist_err_pct', 'pct_err_dist', 'dist_relerr'
        for cand in _error_spellings(base):
            for mark in _RELATIVE_MARKS:
                for spelled in (cand + mark, mark + cand, cand.replace(base, base + mark, 1)):
                    c = by_norm.get(spelled)
                    if c is not None:
                        return c
    return None


def _find_error_pair(names, value_col, role, used):
    """(lower, upper) error columns of ``value_col``, or None.

    VizieR's convention first: ``e_X`` the lower and ``E_X`` the upper error of ``X`` when both are
    present (its byte-by-byte descriptions say 'lower'/'upper' error; common practice); then names with
    a lower and an upper mark (``X_err_lo``/``X_err_hi``, ``X_errminus``/``X_errplus``, ``e_X_low``/...).
    """
    if "e_" + value_col in names and "E_" + value_col in names:
        low, high = "e_" + value_col, "E_" + value_col
        if low not in used and high not in used:
            return low, high
    by_norm = _by_norm(names, value_col, used)
    for base in _bases(value_col, role):
        for cand in _error_spellings(base):
            low = next((by_norm[cand + m] for m in _LOWER_MARKS if cand + m in by_norm), None)
            high = next((by_norm[cand + m] for m in _UPPER_MARKS if cand + m in by_norm), None)
            if low is not None and high is not None:
                return low, high
    return None
