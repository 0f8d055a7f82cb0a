"""Covariance of a maximum-likelihood fit: numerical Hessian, cluster-robust sandwich, cluster jackknife.

Used by :mod:`analysis.window_fit`. The model-based covariance is the inverse Hessian of the negative
log-likelihood; it is right only when the model is right and the records are independent. Readings of one
machine are neither: a label persists from one hourly reading to the next, and the tongue model leaves out
whatever else moves the modulation (wear, temperature). The sandwich H^-1 B H^-1, with B the outer product
of the per-cluster score sums, stays consistent under both (Huber 1967, Proc. 5th Berkeley Symp. 1,
221-233; White 1982, Econometrica 50, 1-25; clustered form: Liang & Zeger 1986, Biometrika 73, 13-22), but
it is biased low when a few clusters carry much of the information (readings next to the threshold). The
delete-one-cluster jackknife corrects that (the "CR3" estimator: Bell & McCaffrey 2002, Survey Methodology
28, 169-181; MacKinnon, Nielsen & Webb 2023, J. Econometrics 232, 272-299); here each leave-one-cluster-out
estimate is one Newton step from the full fit, theta_(-g) - theta = (H - H_g)^-1 U_g. When leaving out a
cluster leaves the Hessian without curvature in some direction, that cluster alone decides the fit, the
step is not defined, and the sandwich is used instead (the caller is told how many such clusters there are).
"""

from __future__ import annotations

import numpy as np


def hessian(fun, x, steps):
    """Central-difference Hessian of a scalar function ``fun`` at ``x`` with per-coordinate ``steps``."""
    n = x.size
    h = np.zeros((n, n))
    f0 = fun(x)
    for i in range(n):
        for j in range(i, n):
            ei = np.zeros(n)
            ej = np.zeros(n)
            ei[i], ej[j] = steps[i], steps[j]
            if i == j:
                val = (fun(x + ei) - 2 * f0 + fun(x - ei)) / steps[i] ** 2
            else:
                val = (fun(x + ei + ej) - fun(x + ei - ej) - fun(x - ei + ej) + fun(x - ei - ej)) / (
                    4 * steps[i] * steps[j]
                )
            h[i, j] = h[j, i] = val
    return h


def scores(terms, x, steps):
    """Per-record gradient (n x p) of the per-record negative log-likelihood ``terms(x) -> (n,)``."""
    cols = []
    for i in range(x.size):
        e = np.zeros(x.size)
        e[i] = steps[i]
        cols.append((terms(x + e) - terms(x - e)) / (2.0 * steps[i]))
    return np.column_stack(cols)


def sandwich(hess, score, clusters):
    """Cluster-robust covariance H^-1 B H^-1 with the small-sample factor G / (G - 1).

    ``clusters`` labels each record (records sharing a label are treated as dependent). Returns
    ``(covariance, number of clusters)``.
    """
    labels, inverse = np.unique(clusters, return_inverse=True)
    g = labels.size
    sums = np.zeros((g, score.shape[1]))
    np.add.at(sums, inverse, score)
    meat = sums.T @ sums * (g / (g - 1.0) if g > 1 else 1.0)
    bread = np.linalg.inv(hess)
    return bread @ meat @ bread, int(g)


def record_hessians(terms, x, steps):
    """Per-record Hessians (n x p x p) of ``terms(x) -> (n,)`` by central differences."""
    p = x.size
    t0 = terms(x)
    out = np.zeros((t0.size, p, p))
    for i in range(p):
        ei = np.zeros(p)
        ei[i] = steps[i]
        out[:, i, i] = (terms(x + ei) - 2.0 * t0 + terms(x - ei)) / steps[i] ** 2
        for j in range(i + 1, p):
            ej = np.zeros(p)
            ej[j] = steps[j]
            v = (terms(x + ei + ej) - terms(x + ei - ej) - terms(x - ei + ej) + terms(x - ei - ej)) / (
                4.0 * steps[i] * steps[j]
            )
            out[:, i, j] = out[:, j, i] = v
    return out


def cluster_jackknife(hess, score, rec_hess, clusters):
    """Delete-one-cluster jackknife covariance (one Newton step per cluster).

    Returns ``(covariance or None, decisive)``: ``decisive`` counts the clusters without which the
    Hessian loses its curvature; with any of them the covariance is ``None`` (use the sandwich).
    """
    labels, inverse = np.unique(clusters, return_inverse=True)
    g = labels.size
    if g < 2:
        return None, 0
    u = np.zeros((g, score.shape[1]))
    np.add.at(u, inverse, score)
    hg = np.zeros((g, *hess.shape))
    np.add.at(hg, inverse, rec_hess)
    rest = hess[None, :, :] - hg
    decisive = int(np.sum(np.linalg.eigvalsh(rest).min(axis=1) <= 0))
    if decisive:
        return None, decisive
    d = np.linalg.solve(rest, u[:, :, None])[:, :, 0]
    d = d - d.mean(axis=0)
    out = (g - 1.0) / g * (d.T @ d)
    return (out if np.all(np.isfinite(out)) else None), 0


def not_below_model(robust, model):
    """The robust covariance with each variance raised to at least the model-based one.

    The sandwich is noisy and biased low in small samples (Kauermann & Carroll 2001, JASA 96, 1387-1396);
    keeping its correlations but never letting a variance fall below the inverse Hessian's guards the
    interval against that, while dependence and misspecification can still widen it.
    """
    d = np.sqrt(np.maximum(1.0, np.diag(model) / np.maximum(np.diag(robust), 1e-300)))
    return robust * np.outer(d, d)
