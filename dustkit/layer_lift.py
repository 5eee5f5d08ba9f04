"""Whether clouds lift a fitted smooth layer: the tracers above it against those below it.

Clouds only add extinction, so a layer fitted through them lies above the cloud-free sight
lines; :func:`cloud_lift` counts the tracers far above and below a layer (any object with
``av_pc`` and ``tracer_errors``, such as :class:`dustkit.layer.DustLayer`) and
:func:`lift_caution` words the result. Plain arrays in deg, pc and mag.
"""

import numpy as np
from scipy import stats

from .tracers.rules import AV_ERR_FLOOR

__all__ = ["LIFT_EXCESS", "cloud_lift", "lift_caution"]


#: Share of the tracers more than 2 of their own errors above a fitted layer, beyond the share
#: below it, from which :func:`cloud_lift` says clouds lift the layer (with the split between
#: the two sides unlikely, at 5%, for a fair coin, so that three tracers of forty do not): in the invented galaxies of
#: ``benchmarks/galaxies.py`` (six draws each) it holds in every draw of the sparse catalogue
#: (layer 7-14% high) and of five large clouds (3-6% high), in one of six smooth ones (2.3%), in
#: none of the others (the clumpy galaxy's tails are even: its clumps are everywhere), and in the
#: demo's Veyra Field with :func:`dustkit.layer.fit_layer` (15% high; 63 tracers above, 41 below), though not
#: with the density model's fit over the distance errors (57 above, 40 below: 4.3%).
LIFT_EXCESS = 0.05


def cloud_lift(layer, b_deg, distance_pc, distance_err_pc, av, av_err):
    """How far tracers above a layer outnumber those below it: a dict ``above``, ``below`` (shares), ``lifted``.

    Noise alone puts as many tracers more than 2 sigma (their own A_V error and distance error
    through the layer's slope) above a fitted layer as below it; clouds only add extinction,
    so where they hold much of a region's dust the tracers behind them outnumber the rest
    above, and the fit through them lies above the cloud-free sight lines. ``lifted`` when the
    excess share is at least :data:`LIFT_EXCESS` and as many above out of those on either side
    is unlikely for a fair coin (one-sided binomial probability below 0.05). A_V errors are
    floored at ``AV_ERR_FLOOR``, as for the fit.
    """
    b, d, de, av = (np.asarray(x, float) for x in (b_deg, distance_pc, distance_err_pc, av))
    sigma = layer.tracer_errors(b, d, de, np.maximum(np.asarray(av_err, float), AV_ERR_FLOOR))
    z = (av - layer.av_pc(b, d)) / np.maximum(sigma, 1e-12)
    n_up, n_down = int(np.sum(z > 2.0)), int(np.sum(z < -2.0))
    n = max(z.size, 1)
    excess = (n_up - n_down) / n
    lifted = bool(excess >= LIFT_EXCESS and stats.binom.sf(n_up - 1, n_up + n_down, 0.5) < 0.05)
    return {"above": n_up / n, "below": n_down / n, "lifted": lifted}


def lift_caution(lift):
    """The sentence that goes with a :func:`cloud_lift` result that says ``lifted``."""
    return (f"{100 * lift['above']:.0f}% of the tracers lie more than 2 sigma above the fitted layer and "
            f"{100 * lift['below']:.0f}% below it: clouds lift the layer, and answers on cloud-free sight "
            "lines that lean on it (in front of clouds, between sparse tracers) may come out several per cent "
            "too high. A layer fitted to a wider catalogue avoids it (layer=..., dustkit build --layer-from).")
