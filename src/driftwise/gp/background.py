"""The background flow of the prior: a uniform velocity plus a linear field about the data's centre.

Drifter clusters have long been summarised by a linear fit v(x) = U + G (x − x₀) (Molinari &
Kirwan 1975, "Calculations of differential kinematic properties from Lagrangian observations in
the western Caribbean Sea", J. Phys. Oceanogr. 5:483).  Here that field is a component of the
prior, v = v_GP + v_b, with independent Gaussian coefficients

    v_b(x) = U + Σ_k c_k B_k ξ,   ξ = x − x₀,   U ~ N(0, σ_U² I),   c_k ~ N(0, s_k²),

where the matrices B_k are chosen so that each coefficient is a physical rate (1/s):

* divergence δ:   B = I/d                                   (∇·v_b = δ)
* rotation ω:     2-D B = ½ [[0, −1], [1, 0]];  3-D ω × ξ/2  (vorticity of v_b = ω; 3 components in 3-D)
* strain:         2-D normal ½ [[1, 0], [0, −1]] (u_x − v_y) and shear ½ [[0, 1], [1, 0]] (v_x + u_y);
                  3-D the five symmetric traceless matrices ½(E_xy + E_yx), ½(E_xz + E_zx),
                  ½(E_yz + E_zy), ½(E_xx − E_yy), ½(E_xx + E_yy − 2E_zz)/√3 (each of Frobenius norm 1/√2).

Its kernel, K_b(x, y) = Cov[v_b(x), v_b(y)] = σ_U² I + Σ_k s_k² (B_k ξ)(B_k η)ᵀ with η = y − x₀, has
closed forms per group (the sums over an orthonormal basis of the trace, antisymmetric and
symmetric traceless matrices are the projectors onto those subspaces):

    divergence   s_δ² ξ ηᵀ / d²
    rotation     s_ω² ¼ [(ξ·η) I − η ξᵀ]
    strain       s_ε² ½ [½((ξ·η) I + η ξᵀ) − ξ ηᵀ / d]

A kernel family only gets the terms it can represent: divergence-free the uniform, rotation and
strain terms; curl-free the uniform, divergence and strain terms; independent all four.  In the
Helmholtz family the divergence-free part holds the uniform, rotation and strain terms and the
curl-free part the divergence term alone, so the curl-free part is exactly the divergent part and
the linear rotation counts as rotational: a uniform stream and a pure strain, being both
divergence- and curl-free, are counted with the divergence-free part.

The scales are stored as logs (one per term, units: m/s for "uniform", 1/s for the rates) and
learned with the other hyperparameters; x₀ and the terms are static (they fix the model, not
its fit).  K_b has rank d + (number of linear coefficients) ≤ 12.
"""

from __future__ import annotations

import dataclasses
import math

import jax
import jax.numpy as jnp
import numpy as np

__all__ = ["BACKGROUNDS", "BACKGROUND_HELP", "TERMS", "Background", "coefficient_names", "describe", "family_terms",
           "features"]

TERMS = ("uniform", "divergence", "rotation", "strain")
BACKGROUNDS = ("none", "uniform", "linear")   # the choices of driftwise.fit(background=...)
BACKGROUND_HELP = ("background flow of the prior, learned with the field: none, uniform (a mean velocity) or linear "
                   "(a mean velocity plus divergence, rotation and strain about the data's centre; default linear)")
_FAMILY_TERMS = {
    "divergence-free": ("uniform", "rotation", "strain"),
    "curl-free": ("uniform", "divergence", "strain"),
    "independent": TERMS,
    "helmholtz:divergence_free": ("uniform", "rotation", "strain"),
    "helmholtz:curl_free": ("divergence",),
}
_STATIC = {"static": True}


def family_terms(family: str, background: str) -> tuple[str, ...]:
    """The terms a kernel family (or "helmholtz:<part>") gets for ``background`` ∈ :data:`BACKGROUNDS`."""
    allowed = _FAMILY_TERMS[family]
    if background == "none":
        return ()
    if background == "uniform":
        return tuple(t for t in allowed if t == "uniform")
    return allowed


def _unit(term: str) -> str:
    return "m_s" if term == "uniform" else "per_s"


@jax.tree_util.register_dataclass
@dataclasses.dataclass(frozen=True)
class Background:
    """K_b(x, y) for the static ``terms`` about the static centre x₀ = ``centre_m`` (d floats, m).

    ``log_scales`` (len(terms),): log σ_U (m/s) for "uniform", log s_k (1/s) for the rate terms.
    """

    log_scales: jax.Array
    terms: tuple[str, ...] = dataclasses.field(default=(), metadata=_STATIC)
    centre_m: tuple[float, ...] = dataclasses.field(default=(), metadata=_STATIC)
    tag: str = dataclasses.field(default="background", metadata=_STATIC, repr=False)

    @classmethod
    def create(cls, terms, centre_m, scales) -> Background:
        """From term names, the centre (d,) in m and the scale of each term (m/s or 1/s, > 0)."""
        terms = tuple(str(t) for t in terms)
        unknown = [t for t in terms if t not in TERMS]
        if unknown or len(set(terms)) != len(terms):
            raise ValueError(f"background terms must be distinct names from {TERMS}, got {terms}")
        scales = np.broadcast_to(np.asarray(scales, dtype=np.float64), (len(terms),))
        return cls(jnp.log(jnp.asarray(scales)), terms, tuple(float(c) for c in np.ravel(centre_m)))

    def variances(self) -> dict[str, jax.Array]:
        """{term: σ² or s²} (m²/s² or 1/s²)."""
        return {term: jnp.exp(2.0 * self.log_scales[i]) for i, term in enumerate(self.terms)}

    def blocks(self, x: jax.Array, y: jax.Array) -> jax.Array:
        """K_b(x, y) for x, y (..., d) in m (broadcasting) → (..., d, d) in m²/s²."""
        d = x.shape[-1]
        xi = x - jnp.asarray(self.centre_m, dtype=x.dtype)
        eta = y - jnp.asarray(self.centre_m, dtype=y.dtype)
        xi, eta = jnp.broadcast_arrays(xi, eta)
        eye = jnp.eye(d, dtype=x.dtype)
        dot = sum(xi[..., i] * eta[..., i] for i in range(d))[..., None, None]
        outer = xi[..., :, None] * eta[..., None, :]       # ξ ηᵀ
        outer_t = eta[..., :, None] * xi[..., None, :]     # η ξᵀ
        var = self.variances()
        total = jnp.zeros(xi.shape + (d,), dtype=x.dtype)
        if "uniform" in var:
            total = total + var["uniform"] * eye
        if "divergence" in var:
            total = total + var["divergence"] / d**2 * outer
        if "rotation" in var:
            total = total + var["rotation"] * 0.25 * (dot * eye - outer_t)
        if "strain" in var:
            total = total + var["strain"] * 0.5 * (0.5 * (dot * eye + outer_t) - outer / d)
        return total

    def hyperparameters(self, prefix: str = "") -> dict[str, float]:
        """Physical scales, units in the key names (``background_uniform_scale_m_s``, ``…_per_s``)."""
        return {f"{prefix}background_{term}_scale_{_unit(term)}": float(jnp.exp(self.log_scales[i]))
                for i, term in enumerate(self.terms)}

    def describe(self) -> dict:
        """What rebuilds it: {"terms": [...], "centre_m": [...]} (JSON-ready)."""
        return {"terms": list(self.terms), "centre_m": list(self.centre_m)}


def _strain_basis(d: int) -> list[np.ndarray]:
    e = np.eye(d)
    pairs = [(0, 1), (0, 2), (1, 2)] if d == 3 else [(0, 1)]
    shear = [0.5 * (np.outer(e[i], e[j]) + np.outer(e[j], e[i])) for i, j in pairs]
    if d == 2:
        return [0.5 * np.diag([1.0, -1.0])] + shear
    return shear + [0.5 * np.diag([1.0, -1.0, 0.0]), 0.5 * np.diag([1.0, 1.0, -2.0]) / math.sqrt(3.0)]


def _rotation_basis(d: int) -> list[np.ndarray]:
    if d == 2:
        return [0.5 * np.array([[0.0, -1.0], [1.0, 0.0]])]
    basis = []
    for k in range(3):                                   # ½ [e_k]×, so that ½ e_k × ξ has curl e_k
        cross = np.zeros((3, 3))
        i, j = (k + 1) % 3, (k + 2) % 3
        cross[i, j], cross[j, i] = -1.0, 1.0
        basis.append(0.5 * cross)
    return basis


def coefficient_names(terms, d: int) -> list[str]:
    """Names of the coefficients, in the order of :func:`features`: u_x…, divergence, rotation…, strain…."""
    axes = "xyz"[:d]
    names = {"uniform": [f"uniform_{a}_m_s" for a in axes], "divergence": ["divergence_per_s"],
             "rotation": ["vorticity_per_s"] if d == 2 else [f"vorticity_{a}_per_s" for a in axes],
             "strain": (["normal_strain_per_s", "shear_strain_per_s"] if d == 2 else
                        ["strain_xy_per_s", "strain_xz_per_s", "strain_yz_per_s", "strain_xx_yy_per_s",
                         "strain_xx_yy_zz_per_s"])}
    return [name for term in terms for name in names[term]]


def features(background: Background, x: jax.Array) -> tuple[jax.Array, jax.Array]:
    """(F (..., d, p), prior variances (p,)) with v_b(x) = F(x) c and c ~ N(0, diag(variances)).

    Columns in the order of :func:`coefficient_names`; K_b(x, y) = F(x) diag(var) F(y)ᵀ.
    """
    d = x.shape[-1]
    xi = x - jnp.asarray(background.centre_m, dtype=x.dtype)
    columns, variances = [], []
    var = background.variances()
    for term in background.terms:
        if term == "uniform":
            mats = [None] * d
        else:
            mats = {"divergence": [np.eye(d) / d], "rotation": _rotation_basis(d), "strain": _strain_basis(d)}[term]
        for a, mat in enumerate(mats):
            col = (jnp.broadcast_to(jnp.eye(d, dtype=x.dtype)[a], xi.shape) if mat is None
                   else jnp.einsum("ij,...j->...i", jnp.asarray(mat, dtype=x.dtype), xi))
            columns.append(col)
            variances.append(var[term])
    return jnp.stack(columns, axis=-1), jnp.stack(variances)


def describe(backgrounds) -> dict | None:
    """The model-file description of a kernel's backgrounds: {"choice", "centre_m", "terms"}, or None."""
    backgrounds = tuple(backgrounds)
    if not backgrounds:
        return None
    terms = [t for b in backgrounds for t in b.terms]
    choice = "linear" if any(t != "uniform" for t in terms) else "uniform"
    return {"choice": choice, "centre_m": list(backgrounds[0].centre_m), "terms": terms}
