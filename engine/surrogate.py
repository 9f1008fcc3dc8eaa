"""The surrogate: a sparse polynomial chaos expansion per output component, in a local frame.

Reference coordinates ``xi`` (see `honing.engine.priors`) are mapped affinely to local
coordinates ``z = ((xi - center) / scale) W``: centred and scaled on the retained runs, then
rotated onto the principal axes of their weighted correlation matrix and scaled to unit
variance along each (``W = V diag(lambda)^(-1/2)``, axes by decreasing ``lambda``). A
total-degree polynomial space is unchanged by an affine map, so the local frame costs nothing
in what the surrogate can represent, and it keeps the design matrix well conditioned when the
posterior is narrow, correlated and far from the prior's centre. The axes matter to a sparse
fit: the data inform a few combinations of parameters, along which the outputs change most,
and on the principal axes each such combination is one coordinate, so the outputs are close
to sums of a few coordinates' polynomials and the hyperbolic (low-interaction) candidate set
holds them in few terms; a symmetric whitening spreads each combination over every
coordinate and needs interaction terms. Without any decorrelation, strongly correlated
parameters give nearly collinear linear terms, whose large ``tr(C^-1)`` inflates the corrected
leave-one-out error of every larger model (seen: a B3 benchmark fit that kept 2 terms where
about 90 were needed). All components share one sparse set of terms chosen for their summed
error, so a fit costs one selection path and a prediction one design matrix, whatever the
number of components.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from honing.engine.bases import PolynomialBasis
from honing.engine.likelihood import OutputReduction
from honing.engine.priors import Family
from honing.engine.regression import fit_degree_adaptive_shared

__all__ = ["Frame", "Surrogate", "fit_surrogate"]

#: Smallest scale of a local coordinate, relative to the reference variable's own spread; keeps
#: the frame invertible when every retained run shares one value of a parameter.
MIN_SCALE = 1e-9
#: Smallest eigenvalue of the runs' correlation matrix that `Frame.local` inverts: runs confined
#: to a lower-dimensional set (every retained run on one line, say) keep a finite whitening.
MIN_CORRELATION_EIGENVALUE = 1e-12
#: Hyperbolic truncation of the candidate basis (q-norm); q < 1 drops high-order interactions
#: first, the usual choice for sparse expansions (Blatman and Sudret, 2011).
Q_NORM = 0.75
#: Largest candidate basis tried for one degree.
MAX_CANDIDATE_TERMS = 3000


@dataclass
class Frame:
    """Affine map from reference to local coordinates, with the basis family per dimension.

    ``z = ((xi - center) / scale) @ whitening``; ``whitening`` None is the identity.
    """

    center: np.ndarray
    scale: np.ndarray
    families: tuple[Family, ...]
    whitening: np.ndarray | None = None

    @classmethod
    def prior(cls, families: Sequence[Family]) -> Frame:
        """The identity frame with the priors' own families: a classic, global expansion."""
        d = len(families)
        return cls(np.zeros(d), np.ones(d), tuple(families))

    @classmethod
    def local(cls, xi: np.ndarray, weights: np.ndarray, decorrelate: bool = True) -> Frame:
        """A frame centred on the weighted mean of the runs, scaled by their weighted sd and,
        with `decorrelate`, turned onto the principal axes of their weighted correlation.

        Local coordinates then have unit spread and no linear correlation under the weights,
        which suits the Hermite family. Each axis's sign is fixed so that its largest entry
        is positive, so that the same runs always give the same frame. A space-filling design
        is uncorrelated by construction; rotating it would only turn sampling noise into an
        arbitrary rotation.
        """
        w = weights / weights.sum()
        center = w @ xi
        scale = np.maximum(np.sqrt(w @ (xi - center) ** 2), MIN_SCALE)
        if not decorrelate:
            return cls(center, scale, ("hermite",) * xi.shape[1])
        standard = (xi - center) / scale
        corr = standard.T @ (standard * w[:, None])
        values, vectors = np.linalg.eigh((corr + corr.T) / 2)
        values, vectors = values[::-1], vectors[:, ::-1]
        largest = np.argmax(np.abs(vectors), axis=0)
        vectors = vectors * np.sign(vectors[largest, np.arange(vectors.shape[1])])
        root = 1.0 / np.sqrt(np.maximum(values, MIN_CORRELATION_EIGENVALUE))
        return cls(center, scale, ("hermite",) * xi.shape[1], vectors * root)

    def to_local(self, xi: np.ndarray) -> np.ndarray:
        standard = (xi - self.center) / self.scale
        return standard if self.whitening is None else standard @ self.whitening


@dataclass
class Surrogate:
    """Predicts whitened residuals from reference coordinates.

    Attributes
    ----------
    frame : Frame
    reduction : OutputReduction
    basis : PolynomialBasis
        Union of every component's selected terms.
    coef : ndarray, shape (n_terms, n_components)
    degree : int
        Largest total degree selected for any component.
    loo_error : ndarray, shape (n_components,)
        Corrected leave-one-out relative error of each component's fit.
    loo_rms : ndarray, shape (n_runs,)
        Per fitted run, the rms over all outputs of its leave-one-out prediction error in
        noise units (components times the correction factor, plus what the reduction drops);
        ``inf`` for a run of leverage 1 (possible for a far, unscored run). Not serialised:
        it describes the fit's own runs.
    """

    frame: Frame
    reduction: OutputReduction
    basis: PolynomialBasis
    coef: np.ndarray
    degree: int
    loo_error: np.ndarray
    loo_rms: np.ndarray = field(default_factory=lambda: np.zeros(0))

    @property
    def n_terms(self) -> int:
        return self.basis.n_terms

    def scores(self, xi: np.ndarray) -> np.ndarray:
        """Component scores at points, shape ``(n_points, n_components)``."""
        return self.basis.design_matrix(self.frame.to_local(np.atleast_2d(xi))) @ self.coef

    def residuals(self, xi: np.ndarray) -> np.ndarray:
        """Whitened residuals at points, shape ``(n_points, output_size)``."""
        return self.reduction.reconstruct(self.scores(xi))

    def misfit(self, xi: np.ndarray) -> np.ndarray:
        """Predicted ``||w||^2`` at points, shape ``(n_points,)``."""
        return self.reduction.misfit(self.scores(xi))

    def to_payload(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        """JSON-able metadata and named arrays (see `honing.engine.state`)."""
        red_meta, red_arrays = self.reduction.to_payload("reduction.")
        meta = {
            "families": list(self.frame.families),
            "basis": self.basis.to_dict(),
            "degree": self.degree,
            "reduction": red_meta,
        }
        arrays = {
            "frame.center": self.frame.center,
            "frame.scale": self.frame.scale,
            **({} if self.frame.whitening is None else {"frame.whitening": self.frame.whitening}),
            "coef": self.coef,
            "loo_error": self.loo_error,
            **red_arrays,
        }
        return meta, arrays

    @classmethod
    def from_payload(cls, meta: dict[str, Any], arrays: dict[str, np.ndarray]) -> Surrogate:
        frame = Frame(
            arrays["frame.center"],
            arrays["frame.scale"],
            tuple(meta["families"]),
            arrays.get("frame.whitening"),
        )
        return cls(
            frame=frame,
            reduction=OutputReduction.from_payload(meta["reduction"], arrays, "reduction."),
            basis=PolynomialBasis.from_dict(meta["basis"]),
            coef=arrays["coef"],
            degree=int(meta["degree"]),
            loo_error=arrays["loo_error"],
        )


def fit_surrogate(
    xi: np.ndarray,
    residuals: np.ndarray,
    weights: np.ndarray,
    frame: Frame,
    max_degree: int,
    scored: np.ndarray | None = None,
) -> Surrogate:
    """Fit the reduction and a shared sparse expansion of the components on weighted runs.

    Parameters
    ----------
    xi : ndarray, shape (n_runs, dim)
        Reference coordinates of the retained runs.
    residuals : ndarray, shape (n_runs, output_size)
        Their whitened residuals.
    weights : ndarray, shape (n_runs,)
        Trust weights in (0, 1].
    frame : Frame
    max_degree : int
        Largest total degree tried.
    scored : ndarray of bool, shape (n_runs,), optional
        Runs whose leave-one-out errors choose the terms and the degree; all by default.

    Returns
    -------
    Surrogate
    """
    reduction = OutputReduction.fit(residuals, weights)
    targets, dropped = reduction.project_with_loss(residuals)
    basis, fit = fit_degree_adaptive_shared(
        frame.to_local(xi),
        targets,
        frame.families,
        max_degree,
        sample_weight=weights,
        q=Q_NORM,
        max_terms=MAX_CANDIDATE_TERMS,
        scored=scored,
    )
    squared = fit.correction * np.sum(fit.loo_residuals**2, axis=1) + dropped
    return Surrogate(
        frame=frame,
        reduction=reduction,
        basis=basis,
        coef=fit.coef,
        degree=basis.degree,
        loo_error=fit.loo_error,
        loo_rms=np.sqrt(squared / residuals.shape[1]),
    )
