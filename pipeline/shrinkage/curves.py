"""Each unit's binomial log-likelihood as a smooth curve in its intercept.

With the case-mix offsets fixed, unit i's log-likelihood depends on the shrinkage model's
parameters only through one number, its intercept a_i = mu + u_i::

    L_i(a) = sum over the unit's cells of  r * (offset + a) - n * log(1 + exp(offset + a))

L_i is smooth and concave, so a Chebyshev series on a window around its maximum represents it
almost exactly (Trefethen, *Approximation Theory and Approximation Practice*, 2013, ch. 8:
geometric convergence for analytic functions), and beyond the window a second-order Taylor
expansion at the window's edge continues it. The sampler then works with units x degree
numbers, whatever the number of patients or distinct risks: its cost no longer grows with
patients. The error is measured, not assumed (``max_error``; DEVELOPERS.md quotes it against
the exact per-patient likelihood on a 100,000-patient subset).

The series is evaluated by Clenshaw's recurrence inside one PyTensor Op whose NumPy and Numba
implementations share the same compiled kernel, so PyMC's own sampler and nutpie run identical code.
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np
from numpy.polynomial import chebyshev
from scipy.special import expit

# measured error: DEVELOPERS.md, "Unit likelihood curves" (benchmarks/glmer_peer.py prints it)
DEGREE = 32
WINDOW_SE = 6.0  # half-width of each unit's window, in standard errors of its intercept
# series of log P_i(a) on [-8, 8] for the predicted/expected ratio
RATIO_DEGREE, RATIO_RANGE = 64, 8.0


@dataclass(frozen=True)
class Curves:
    """Chebyshev series of every unit's log-likelihood in its intercept (units without patients:
    zero)."""

    centre: np.ndarray  # (units,)
    width: np.ndarray  # (units,) half-width of the window
    coef: np.ndarray  # (units, DEGREE + 1)
    edges: np.ndarray  # (6, units): L, L', L'' at centre - width, then at centre + width
    # (RATIO_DEGREE + 1, units): series of log P_i(a), P_i(a) = sum n expit(offset + a)
    ratio_coef: np.ndarray
    # (units,) standard error of the intercept at the centre (for the parameterisation)
    se: np.ndarray

    def data(self) -> dict[str, np.ndarray]:
        return {"coef": self.coef, "centre": self.centre, "width": self.width, "edges": self.edges}

    def log_predicted(self, a: np.ndarray) -> np.ndarray:
        """log P_i(a) for an array of intercepts whose last axis is the unit."""
        x = np.clip(a / RATIO_RANGE, -1.0, 1.0)
        return chebyshev.chebval(x, self.ratio_coef, tensor=False)


def unit_sums(
    unit: np.ndarray, offset: np.ndarray, n: np.ndarray, r: np.ndarray, n_units: int, a: np.ndarray
):
    """Exact L_i(a_i), L_i'(a_i) and L_i''(a_i) of every unit, from its cells."""
    eta = offset + a[unit]
    p = expit(eta)
    value = np.bincount(unit, weights=r * eta - n * np.logaddexp(0.0, eta), minlength=n_units)
    slope = np.bincount(unit, weights=r - n * p, minlength=n_units)
    curvature = -np.bincount(unit, weights=n * p * (1 - p), minlength=n_units)
    return value, slope, curvature


@numba.njit(cache=True, nogil=True)
def _at_points(unit, offset, n, r, points, shared):
    """L_i at each unit's own points (units, m) and P_i at the shared points (q,), in one pass over
    the cells."""
    k, m = points.shape
    value = np.zeros((k, m))
    predicted = np.zeros((k, len(shared)))
    for j in range(len(unit)):
        i = unit[j]
        for c in range(m):
            eta = offset[j] + points[i, c]
            soft = eta + np.log1p(np.exp(-eta)) if eta > 0 else np.log1p(np.exp(eta))
            value[i, c] += r[j] * eta - n[j] * soft
        for c in range(len(shared)):
            predicted[i, c] += n[j] / (1.0 + np.exp(-(offset[j] + shared[c])))
    return value, predicted


def build_curves(
    unit: np.ndarray, offset: np.ndarray, n: np.ndarray, r: np.ndarray, n_units: int
) -> Curves:
    """Fit each unit's series at Chebyshev points of a window centred on its (lightly penalised)
    maximum."""
    sums = lambda a: unit_sums(unit, offset, n, r, n_units, a)  # noqa: E731
    cases = np.bincount(unit, weights=n, minlength=n_units)
    events = np.bincount(unit, weights=r, minlength=n_units)
    mean_offset = np.bincount(unit, weights=n * offset, minlength=n_units) / np.maximum(cases, 1)
    p = (events + 0.5) / (cases + 1)
    centre = np.log(p / (1 - p)) - mean_offset  # a close start: few Newton steps are needed
    for _ in range(100):  # Newton on L_i(a) - a^2/8, finite even for units with no events
        _, slope, curvature = sums(centre)
        step = (slope - centre / 4) / (curvature - 0.25)
        centre -= step
        if np.abs(step).max() < 1e-10:
            break
    curvature = sums(centre)[2]
    se = 1 / np.sqrt(0.25 - curvature)
    width = np.clip(WINDOW_SE * se, 0.5, 8.0)
    nodes = np.cos(np.pi * (np.arange(DEGREE + 1) + 0.5) / (DEGREE + 1))
    grid = np.cos(np.pi * (np.arange(RATIO_DEGREE + 1) + 0.5) / (RATIO_DEGREE + 1))
    points = centre[:, None] + width[:, None] * nodes[None, :]
    values, predicted = _at_points(
        unit.astype(np.int64),
        offset.astype(float),
        n.astype(float),
        r.astype(float),
        points,
        RATIO_RANGE * grid,
    )
    coef = np.ascontiguousarray(chebyshev.chebfit(nodes, values.T, DEGREE).T)
    edges = np.array([*sums(centre - width), *sums(centre + width)])
    ratio_coef = chebyshev.chebfit(grid, np.log(np.maximum(predicted.T, 1e-300)), RATIO_DEGREE)
    return Curves(centre, width, coef, edges, ratio_coef, se)


@numba.njit(cache=True, nogil=True)
def curve_values(a, coef, centre, width, edges, derivative):
    """L_i(a_i) (or its derivative) for every unit: Clenshaw inside the window, Taylor outside."""
    k, degree = coef.shape[0], coef.shape[1] - 1
    out = np.empty(k)
    for i in range(k):
        t = (a[i] - centre[i]) / width[i]
        if t < -1.0 or t > 1.0:
            j = 0 if t < -1.0 else 3
            d = a[i] - (centre[i] - width[i] if t < -1.0 else centre[i] + width[i])
            if derivative:
                out[i] = edges[j + 1, i] + edges[j + 2, i] * d
            else:
                out[i] = edges[j, i] + edges[j + 1, i] * d + 0.5 * edges[j + 2, i] * d * d
            continue
        b1, b2 = 0.0, 0.0
        if derivative:  # d/dt sum c_j T_j(t) = sum j c_j U_{j-1}(t): Clenshaw for U
            for j in range(degree, 0, -1):
                b1, b2 = j * coef[i, j] + 2.0 * t * b1 - b2, b1
            out[i] = b1 / width[i]
        else:
            for j in range(degree, 0, -1):
                b1, b2 = coef[i, j] + 2.0 * t * b1 - b2, b1
            out[i] = coef[i, 0] + t * b1 - b2
    return out


def max_error(
    unit, offset, n, r, n_units: int, curves: Curves, points: int = 20, seed: int = 0
) -> float:
    """Largest absolute difference between the series and the exact L_i at random points of every
    window."""
    rng = np.random.default_rng(seed)
    worst = 0.0
    for _ in range(points):
        a = curves.centre + curves.width * rng.uniform(-1, 1, n_units)
        exact = unit_sums(unit, offset, n, r, n_units, a)[0]
        worst = max(
            worst,
            float(
                np.max(
                    np.abs(
                        exact
                        - curve_values(
                            a, curves.coef, curves.centre, curves.width, curves.edges, False
                        )
                    )
                )
            ),
        )
    return worst


def _op_classes():
    """The PyTensor Op (built lazily: importing PyTensor is slow and the data stages do not need
    it)."""
    import pytensor
    import pytensor.tensor as pt
    from pytensor.graph.basic import Apply
    from pytensor.graph.op import Op
    from pytensor.link.numba.dispatch.basic import register_funcify_default_op_cache_key

    class CurveLogLik(Op):
        """Per-unit log-likelihood from the curves (``derivative=True``: its slope, for the
        gradient)."""

        __props__ = ("derivative",)

        def __init__(self, derivative: bool = False):
            self.derivative = derivative

        def make_node(self, a, coef, centre, width, edges):  # type: ignore[override]
            inputs = [pt.as_tensor_variable(v) for v in (a, coef, centre, width, edges)]
            return Apply(self, inputs, [pt.dvector()])

        def perform(self, node, inputs, outputs):
            outputs[0][0] = curve_values(
                *[np.asarray(v, dtype=float) for v in inputs], self.derivative
            )

        def grad(self, inputs, output_grads):
            if self.derivative:
                raise NotImplementedError("the sampler needs first derivatives only")
            slope = CurveLogLik(True)(*inputs)
            return [output_grads[0] * slope] + [
                pytensor.gradient.grad_undefined(self, i, v) for i, v in enumerate(inputs[1:], 1)
            ]

    @register_funcify_default_op_cache_key(CurveLogLik)
    def _numba(op, node=None, **kwargs):
        derivative = op.derivative

        @numba.njit
        def kernel(a, coef, centre, width, edges):
            return curve_values(a, coef, centre, width, edges, derivative)

        return kernel

    return CurveLogLik


_op_class = None  # built on first use; lower case: not a constant, so not part of the fit key


def curve_loglik(a, data: dict):
    """The symbolic per-unit log-likelihood for a PyMC model (``data``: pm.Data of
    :meth:`Curves.data`)."""
    global _op_class
    if _op_class is None:
        _op_class = _op_classes()
    return _op_class()(a, data["coef"], data["centre"], data["width"], data["edges"])
