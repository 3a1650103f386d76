"""Sparse polynomial surrogates of a learned correction: libraries and thresholded least squares.

A learned correction ``m(v)`` (``v`` the observed variables, for memory closures also
the filtered hidden states) is summarised by a few polynomial terms::

    m_i(v) ≈ Σ_k ξ_ki θ_k(v),        θ_k(v) = Π_j v_j^{e_kj}

The coefficients come from sequentially thresholded least squares (STLSQ): solve
least squares on the active terms, drop every term whose *contribution*
``|ξ_k|·rms(θ_k)`` is below ``threshold × scale`` (``scale`` the size of the
component being fitted), and repeat on the survivors until the active set stops
changing. Measuring terms by contribution rather than raw coefficient makes the
threshold independent of the variables' units.

Reference: S. L. Brunton, J. L. Proctor, J. N. Kutz, "Discovering governing
equations from data by sparse identification of nonlinear dynamical systems",
PNAS 113 (2016) 3932–3937.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field

import numpy as np
import torch

__all__ = ["PolynomialLibrary", "stlsq", "SparseFit", "fit_sparse", "r_squared", "format_equation"]


class PolynomialLibrary:
    """All monomials of total degree ≤ ``degree`` in named variables.

    Variables listed in ``linear_only`` enter at most ``linear_degree`` times in a
    monomial (hidden states of memory closures are many; products of them are
    rarely wanted and would make the library large).

    Args:
        names: variable names, in the column order of the inputs.
        degree: highest total degree (0 gives the constant only).
        linear_only: names whose total power per monomial is capped.
        linear_degree: that cap.

    Raises:
        ValueError: a negative degree or an unknown name in ``linear_only``.
    """

    def __init__(self, names, degree: int = 2, linear_only=(), linear_degree: int = 1):
        names = [str(n) for n in names]
        if int(degree) < 0:
            raise ValueError(f"polynomial degree must be ≥ 0, got {degree}")
        unknown = set(linear_only) - set(names)
        if unknown:
            raise ValueError(f"linear_only names {sorted(unknown)} are not among the variables {names}")
        self.names, self.degree = names, int(degree)
        capped = np.array([n in set(linear_only) for n in names], dtype=bool)
        exponents = []
        for d in range(self.degree + 1):
            for combo in itertools.combinations_with_replacement(range(len(names)), d):
                e = np.bincount(np.asarray(combo, dtype=int), minlength=len(names))
                if e[capped].sum() <= int(linear_degree):
                    exponents.append(e)
        self.exponents = np.array(exponents, dtype=int).reshape(-1, len(names))

    def __len__(self) -> int:
        return self.exponents.shape[0]

    @property
    def term_names(self) -> list[str]:
        """``'1'``, ``'x'``, ``'x·z'``, ``'y^2'``, … in column order."""
        out = []
        for e in self.exponents:
            parts = [n if p == 1 else f"{n}^{p}" for n, p in zip(self.names, e) if p]
            out.append("·".join(parts) if parts else "1")
        return out

    def __call__(self, v):
        """Library matrix ``Θ(v)`` ``(..., n_terms)`` of ``v`` ``(..., n_variables)``; numpy in, numpy out."""
        if isinstance(v, torch.Tensor):
            e = torch.as_tensor(self.exponents, dtype=v.dtype, device=v.device)
            cols = [torch.prod(v ** e[k], dim=-1) for k in range(e.shape[0])]
            return torch.stack(cols, dim=-1)
        v = np.asarray(v, dtype=np.float64)
        return np.stack([np.prod(v ** e, axis=-1) for e in self.exponents], axis=-1)


    def jacobian(self, v: torch.Tensor) -> torch.Tensor:
        """``∂θ_k/∂v_j`` ``(..., n_terms, n_variables)`` in closed form (torch)."""
        e = torch.as_tensor(self.exponents, dtype=v.dtype, device=v.device)     # (K, V)
        cols = []
        for j in range(e.shape[1]):
            lowered = e.clone()
            lowered[:, j] = torch.clamp(e[:, j] - 1, min=0)
            cols.append(e[:, j] * torch.prod(v[..., None, :] ** lowered, dim=-1))
        return torch.stack(cols, dim=-1)


def stlsq(A: np.ndarray, b: np.ndarray, threshold: float, column_size: np.ndarray | None = None,
          scale: float = 1.0, max_iter: int = 20):
    """Sequentially thresholded least squares for ``A ξ ≈ b``.

    Each round solves ordinary least squares (``numpy.linalg.lstsq``) on the active
    columns, then deactivates the columns with ``|ξ_k|·column_size_k < threshold·scale``;
    it stops when no column is dropped. Columns are rescaled to unit size inside the
    solve for conditioning; the returned coefficients are in the original units.

    Args:
        A: ``(N, K)`` design matrix.
        b: ``(N,)`` targets.
        threshold: relative threshold λ ≥ 0 (0 gives plain least squares).
        column_size: ``(K,)`` size of each column's contribution per unit coefficient
            (default: the columns' RMS).
        scale: the size a contribution is compared with (e.g. the target's RMS).
        max_iter: most rounds.

    Returns:
        ``(ξ, active)``: ``(K,)`` coefficients (0 where dropped) and the boolean mask.
    """
    A = np.asarray(A, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64).reshape(-1)
    K = A.shape[1]
    if column_size is None:
        column_size = np.sqrt(np.mean(A ** 2, axis=0))
    column_size = np.asarray(column_size, dtype=np.float64)
    unit = np.where(column_size > 0, column_size, 1.0)
    active = column_size > 0
    xi = np.zeros(K)
    for _ in range(max(1, int(max_iter))):
        xi = np.zeros(K)
        if active.any():
            sol = np.linalg.lstsq(A[:, active] / unit[active], b, rcond=None)[0]
            xi[active] = sol / unit[active]
        keep = active & (np.abs(xi) * column_size >= float(threshold) * float(scale))
        if keep.sum() == active.sum():
            break
        active = keep
    else:  # the last round dropped terms: solve once more on the survivors
        xi = np.zeros(K)
        if active.any():
            xi[active] = np.linalg.lstsq(A[:, active] / unit[active], b, rcond=None)[0] / unit[active]
    return xi, active


def r_squared(predicted, target) -> float:
    """Coefficient of determination ``1 − Σ(ŷ − y)² / Σ(y − ȳ)²`` (NaN for constant targets)."""
    p = np.asarray(predicted, dtype=np.float64).reshape(-1)
    y = np.asarray(target, dtype=np.float64).reshape(-1)
    spread = float(np.sum((y - y.mean()) ** 2))
    if spread <= 0 or y.size == 0:
        return math.nan
    return 1.0 - float(np.sum((p - y) ** 2)) / spread


@dataclass
class SparseFit:
    """A sparse polynomial surrogate ``m ≈ Θ(v) Ξ`` of a multi-component correction.

    Attributes:
        library: the :class:`PolynomialLibrary` of the terms.
        coefficients: ``(n_terms, n_components)`` Ξ (zeros where dropped).
        component_names: names of the fitted components.
        r2: per component, R² of the surrogate against what it was fitted to.
        scale: per component, the size terms were compared with.
        contribution: ``(n_terms, n_components)`` ``|ξ|·rms(θ)`` on the fitting data.
        threshold: the relative threshold used.
        negligible: per component, ``True`` when the fitted values were below the
            noise floor and no terms were kept.
    """

    library: PolynomialLibrary
    coefficients: np.ndarray
    component_names: list[str]
    r2: list[float]
    scale: list[float]
    contribution: np.ndarray
    threshold: float
    negligible: list[bool] = field(default_factory=list)

    def predict(self, v) -> np.ndarray:
        return self.library(np.asarray(v, dtype=np.float64)) @ self.coefficients

    def terms(self, component: int) -> list[tuple[str, float, float]]:
        """``(term, coefficient, contribution)`` of the kept terms of one component, largest first."""
        names = self.library.term_names
        kept = np.nonzero(self.coefficients[:, component])[0]
        rows = [(names[k], float(self.coefficients[k, component]), float(self.contribution[k, component]))
                for k in kept]
        return sorted(rows, key=lambda r: -r[2])

    def coefficient(self, term: str, component: int) -> float:
        """Coefficient of ``term`` (as in :attr:`PolynomialLibrary.term_names`) in ``component``."""
        return float(self.coefficients[self.library.term_names.index(term), component])

    def equations(self, lhs=None) -> list[str]:
        """One printed equation per component, e.g. ``m_y = +1.400·x   (R² = 0.9998)``."""
        lhs = lhs or [f"m_{n}" for n in self.component_names]
        return [format_equation(lhs[i], self.terms(i), self.r2[i], self.negligible[i] if self.negligible else False)
                for i in range(len(self.component_names))]

    def to_dict(self) -> dict:
        return {
            "variables": self.library.names, "degree": self.library.degree, "threshold": self.threshold,
            "components": {
                name: {"terms": {t: c for t, c, _ in self.terms(i)}, "r2": self.r2[i], "scale": self.scale[i],
                       "negligible": bool(self.negligible[i]) if self.negligible else False}
                for i, name in enumerate(self.component_names)
            },
        }


def format_equation(lhs: str, terms, r2: float, negligible: bool = False) -> str:
    """``lhs = c1·t1 + c2·t2   (R² = …)`` from ``(term, coefficient, contribution)`` rows."""
    if not terms:
        body = "0"
    else:
        parts = []
        for i, (t, c, _) in enumerate(terms):
            sign = "−" if c < 0 else ("" if i == 0 else "+")
            mag = f"{abs(c):.4g}"
            piece = mag if t == "1" else f"{mag}·{t}"
            parts.append(f"{sign}{piece}" if i == 0 else f"{sign} {piece}")
        body = " ".join(parts)
    r2_text = "n/a" if r2 is None or not math.isfinite(r2) else f"{r2:.4f}"
    note = "; below the noise floor" if negligible else ""
    return f"{lhs} = {body}   (R² = {r2_text}{note})"


def fit_sparse(library: PolynomialLibrary, v, m, *, threshold: float = 0.01, component_names=None,
               floor=None, max_iter: int = 20) -> SparseFit:
    """Fit a sparse polynomial surrogate to values ``m (N, C)`` of a correction at points ``v (N, V)``.

    Each component is fitted on its own by :func:`stlsq` with ``scale_i =
    max(rms(m_i), floor_i)``. ``floor`` (e.g. 1 % of the nominal physics' size in
    that component) keeps a component that is only noise from acquiring terms: a
    component whose RMS is below its floor is marked negligible, though terms larger
    than ``threshold·floor`` are still kept.

    Args:
        library: the candidate terms.
        v: ``(N, V)`` variables (columns in the library's order).
        m: ``(N, C)`` correction values.
        threshold: relative threshold λ.
        component_names: names of the ``C`` components.
        floor: ``(C,)`` noise floors, or ``None`` (0).
        max_iter: STLSQ rounds.
    """
    v = np.asarray(v, dtype=np.float64)
    m = np.asarray(m, dtype=np.float64)
    if m.ndim == 1:
        m = m[:, None]
    theta = library(v)
    size = np.sqrt(np.mean(theta ** 2, axis=0))
    C = m.shape[1]
    floor = np.zeros(C) if floor is None else np.broadcast_to(np.asarray(floor, dtype=np.float64), (C,))
    coef = np.zeros((len(library), C))
    r2, scales, negligible = [], [], []
    for i in range(C):
        rms = float(np.sqrt(np.mean(m[:, i] ** 2)))
        scale = max(rms, float(floor[i]))
        xi, _ = stlsq(theta, m[:, i], threshold, column_size=size, scale=scale, max_iter=max_iter)
        coef[:, i] = xi
        r2.append(r_squared(theta @ xi, m[:, i]))
        scales.append(scale)
        negligible.append(bool(rms < float(floor[i])))
    names = list(component_names) if component_names is not None else [str(i) for i in range(C)]
    return SparseFit(library, coef, names, r2, scales, np.abs(coef) * size[:, None], float(threshold), negligible)
