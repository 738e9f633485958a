"""Deflection and its derivatives at points: the local interpolant's terms
(`LocalTerms`) and the noise-aware least-squares fits of float32 maps (`LocalFit`)."""

import numpy as np

from .precision import FIT_DEGREE, fit_degree
from .stencils import fit_frame, fit_projector, monomials

__all__ = ["LocalTerms", "LocalFit", "sky_shear"]



class LocalTerms:
    """Deflection (map pixels, unscaled) and its derivatives at points.

    Attributes ``ax, ay, a11, a12, a21, a22`` are arrays; with second
    derivatives requested also ``grad_T`` and ``grad_D`` (each a pair of
    arrays, d/dx and d/dy) for Newton steps on det A.
    """

    def __init__(self, frame, **arrays):
        self.frame = frame
        self.__dict__.update(arrays)

    def det_a(self, f):
        """det A for scaling factor ``f`` (design notes, section 4)."""
        trace = self.a11 + self.a22
        determinant = self.a11 * self.a22 - self.a12 * self.a21
        return 1.0 - f * trace + f * f * determinant

    def grad_det_a(self, f):
        """Gradient of det A in map pixels, as (d/dx, d/dy)."""
        return tuple(-f * gt + f * f * gd for gt, gd in zip(self.grad_T, self.grad_D))

    def convergence(self, f):
        return 0.5 * f * (self.a11 + self.a22)

    def shear(self, f):
        """Shear components (gamma1, gamma2) on the sky's axes.

        The Jacobian is taken to sky axes first (M a M^-1, M the pixel-to-
        plane matrix): trace and determinant survive the change of frame, the
        shear only when pixels are square.
        """
        return sky_shear(self.a11, self.a12, self.a21, self.a22, self.frame, f)

    def eigenvalues(self, f):
        """(lambda_t, lambda_r) of the symmetric part of A."""
        kappa = self.convergence(f)
        gamma = np.hypot(*self.shear(f))
        return 1.0 - kappa - gamma, 1.0 - kappa + gamma


class LocalFit:
    """Polynomial fits of both deflection maps around a set of points.

    Made by `DeflectionField.local_fit`; `terms` evaluates them at the same
    points or at positions moved by up to about a pixel.
    """

    def __init__(self, field, col0, row0, window, coefficients, noise, valid):
        self.field = field
        self.col0, self.row0, self.window = col0, row0, window
        #: (2, N, d+1, d+1) tensor coefficients of the x and y maps (`stencils.fit_coefficients`)
        self.coefficients = coefficients
        #: (2, N) rounding noise (map pixels) of the two maps' node values
        self.noise = noise
        self.valid = valid

    @classmethod
    def scatter(cls, parts, members, valid):
        """Join fits made for disjoint groups of points back into point order."""
        n = len(valid)
        size = parts[0].coefficients.shape[-1]
        col0, row0, window = (np.zeros(n, np.int64) for _ in range(3))
        coefficients = np.zeros((2, n, size, size))
        noise = np.zeros((2, n))
        for part, mine in zip(parts, members):
            col0[mine], row0[mine], window[mine] = part.col0, part.row0, part.window
            coefficients[:, mine] = part.coefficients
            noise[:, mine] = part.noise
        return cls(parts[0].field, col0, row0, window, coefficients, noise, valid)

    def subset(self, index):
        """The fits of some of the points (an index array)."""
        return LocalFit(self.field, self.col0[index], self.row0[index], self.window[index],
                        self.coefficients[:, index], self.noise[:, index], self.valid[index])

    def terms(self, x, y, *, second_derivatives=False, noise=True):
        """`LocalTerms` at positions near the points the fits were made for.

        Parameters
        ----------
        x, y : array_like
            Map pixel positions, one per fitted point (any shape of that size).
        second_derivatives : bool
            Also the gradients of T and D, for Newton steps.
        noise : bool
            Also ``sigma_a`` (else None), e.g. not at every Newton step.
        """
        x = np.asarray(x, dtype=float)
        shape = x.shape
        x = x.ravel()
        y = np.asarray(y, dtype=float).ravel()
        inside = self.valid & self.field.inside(x, y)
        centre, scale = fit_frame(self.window)
        sx = (np.where(inside, x, self.col0) - self.col0 - centre) / scale
        sy = (np.where(inside, y, self.row0) - self.row0 - centre) / scale
        orders = 3 if second_derivatives else 2
        # Per order d, the monomials' d-th derivatives in pixels: d/dt = (1/scale) d/ds.
        bx = np.stack([monomials(sx, d, FIT_DEGREE) / scale[:, None] ** d for d in range(orders)], 2)
        by = np.stack([monomials(sy, d, FIT_DEGREE) / scale[:, None] ** d for d in range(orders)], 2)
        # fitted[k][n, dy, dx]: d^dy/dy^dy d^dx/dx^dx of map k at point n.
        fitted = [np.matmul(by.transpose(0, 2, 1), np.matmul(c, bx)) for c in self.coefficients]
        gram = {n: _padded_gram(int(n)) for n in (np.unique(self.window) if noise else ())}
        norms = np.empty((len(x), 2, 2))  # |weights| of (axis y, x) for orders 0, 1
        for n, g in gram.items():
            mine = self.window == n
            for axis, basis in enumerate((by, bx)):
                b = basis[mine][:, :, :2]
                norms[mine, axis] = np.sqrt(np.sum(b * np.matmul(g, b), axis=1))
        nan = np.where(inside, 0.0, np.nan)
        value = {}
        for k, label in enumerate("xy"):
            value["a" + label] = fitted[k][:, 0, 0]
            value[label + "_x"] = fitted[k][:, 0, 1]
            value[label + "_y"] = fitted[k][:, 1, 0]
            if second_derivatives:
                value[label + "_xx"] = fitted[k][:, 0, 2]
                value[label + "_xy"] = fitted[k][:, 1, 1]
                value[label + "_yy"] = fitted[k][:, 2, 0]
        value = {key: v + nan for key, v in value.items()}
        terms = dict(ax=value["ax"], ay=value["ay"], a11=value["x_x"], a12=value["x_y"],
                     a21=value["y_x"], a22=value["y_y"])
        if second_derivatives:
            a11, a12, a21, a22 = terms["a11"], terms["a12"], terms["a21"], terms["a22"]
            grad = {  # d(a_ij)/dx, d(a_ij)/dy
                "a11": (value["x_xx"], value["x_xy"]), "a12": (value["x_xy"], value["x_yy"]),
                "a21": (value["y_xx"], value["y_xy"]), "a22": (value["y_xy"], value["y_yy"]),
            }
            terms["grad_T"] = tuple(grad["a11"][k] + grad["a22"][k] for k in range(2))
            terms["grad_D"] = tuple(
                a22 * grad["a11"][k] + a11 * grad["a22"][k]
                - a21 * grad["a12"][k] - a12 * grad["a21"][k]
                for k in range(2)
            )
        # d/dx takes the x-derivative weights in x and the value weights in y, and so on.
        sx_, sy_ = norms[:, 1], norms[:, 0]
        terms["sigma_a"] = tuple(
            self.noise[k] * sy_[:, dy] * sx_[:, dx] + nan
            for k in range(2) for dy, dx in ((0, 1), (1, 0))) if noise else None
        for key, val in terms.items():
            if isinstance(val, tuple):
                terms[key] = tuple(np.reshape(v, shape) for v in val)
            elif val is not None:
                terms[key] = val.reshape(shape)
        terms["window"] = np.where(inside, self.window, 0).reshape(shape)
        return LocalTerms(self.field._frame, **terms)


def _padded_gram(n_nodes):
    """P P^T of the fit projector on ``n_nodes``, padded to FIT_DEGREE + 1 terms:
    |weights|^2 of any evaluation is b^T (P P^T) b for its monomials b."""
    projector = fit_projector(n_nodes, fit_degree(n_nodes))
    gram = np.zeros((FIT_DEGREE + 1, FIT_DEGREE + 1))
    size = len(projector)
    gram[:size, :size] = projector @ projector.T
    return gram


def sky_shear(a11, a12, a21, a22, frame, f):
    """Shear (gamma1, gamma2) of the pixel-frame Jacobian a, on sky axes."""
    (m11, m12), (m21, m22) = frame[0]
    (n11, n12), (n21, n22) = frame[1]
    # b = M a M^-1, written out for stacks of 2 x 2 matrices.
    c11, c12 = a11 * n11 + a12 * n21, a11 * n12 + a12 * n22
    c21, c22 = a21 * n11 + a22 * n21, a21 * n12 + a22 * n22
    b11, b12 = m11 * c11 + m12 * c21, m11 * c12 + m12 * c22
    b21, b22 = m21 * c11 + m22 * c21, m21 * c12 + m22 * c22
    return 0.5 * f * (b11 - b22), 0.5 * f * (b12 + b21)
