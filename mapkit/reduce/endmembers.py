"""Endmember extraction: the purest pixels of a map, to seed factorisations."""

from __future__ import annotations

import numpy as np

from ..errors import MapkitError


def vca(X, n_endmembers: int, *, random_state: int = 0) -> np.ndarray:
    """Vertex component analysis (Nascimento & Bioucas-Dias 2005, IEEE TGRS 43:898).

    Projects the spectra onto their leading ``n_endmembers``-dimensional subspace and
    repeatedly picks the pixel with the largest projection on a direction orthogonal to
    the endmembers found so far. Returns the row indices of the chosen pixels.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> E = np.abs(rng.normal(size=(3, 40)))
    >>> F = rng.dirichlet(np.ones(3), 200); F[:3] = np.eye(3)
    >>> sorted(vca(F @ E, 3).tolist())
    [0, 1, 2]
    """
    X = np.asarray(X, dtype=np.float64)
    n, d = X.shape
    if not 1 <= n_endmembers <= min(n, d):
        raise MapkitError(f"cannot extract {n_endmembers} endmembers from {n} spectra of "
                          f"{d} channels", field="n_components",
                          fix=f"choose at most {min(n, d)}")
    rng = np.random.default_rng(random_state)
    # signal subspace by SVD of the (uncentred) data, as for the SNR-high case of the paper
    _, _, vt = np.linalg.svd(X, full_matrices=False)
    Y = X @ vt[:n_endmembers].T                      # (n, p)
    p = n_endmembers
    A = np.zeros((p, p))
    A[-1, 0] = 1.0
    chosen = []
    for i in range(p):
        w = rng.normal(size=p)
        f = w - A @ np.linalg.pinv(A) @ w
        f /= np.linalg.norm(f) or 1.0
        v = Y @ f
        if chosen:
            v[chosen] = 0.0
        k = int(np.argmax(np.abs(v)))
        chosen.append(k)
        A[:, i] = Y[k]
    return np.array(chosen)


def successive_projections(Y, n_endmembers: int) -> np.ndarray:
    """Successive projection algorithm: the rows of ``Y`` that span its cone best.

    Picks the row of largest norm, projects every row onto the orthogonal complement of
    it, and repeats (Araújo et al. 2001, Chemom. Intell. Lab. Syst. 57:65; its robustness
    to noise for separable non-negative factorisation: Gillis & Vavasis 2014, IEEE TPAMI
    36:698). Unlike :func:`vca` it needs no positive data, so it works on spectra whose
    background has been projected out. Returns the row indices.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> E = rng.normal(size=(3, 40))
    >>> F = rng.dirichlet(np.ones(3), 200); F[[5, 50, 150]] = np.eye(3)
    >>> sorted(successive_projections(F @ E, 3).tolist())
    [5, 50, 150]
    """
    R = np.array(Y, dtype=np.float64)
    if not 1 <= n_endmembers <= min(R.shape):
        raise MapkitError(f"cannot extract {n_endmembers} endmembers from {R.shape[0]} spectra "
                          f"of {R.shape[1]} channels", field="n_components",
                          fix=f"choose at most {min(R.shape)}")
    chosen = []
    for _ in range(n_endmembers):
        j = int(np.argmax(np.einsum("ij,ij->i", R, R)))
        chosen.append(j)
        u = R[j] / (np.linalg.norm(R[j]) or 1.0)
        R -= np.outer(R @ u, u)
    return np.array(chosen)
