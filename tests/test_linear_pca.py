"""`linear` trained on reconstruction alone reaches the PCA optimum (Eckart-Young theorem)."""

from __future__ import annotations

import numpy as np
import torch
from sklearn.decomposition import PCA

from coreach_plugins.loss.reconstruction import Reconstruction
from coreach_plugins.model.linear import LinearDecoder
from coreach.training.terms import TermBatch

N, DIM, LATENT = 3000, 7, 2


def _data() -> np.ndarray:
    """Correlated 7-D Gaussian with a non-zero mean: a random rotation of known axis variances."""
    rng = np.random.default_rng(0)
    rotation, _ = np.linalg.qr(rng.standard_normal((DIM, DIM)))
    scales = np.sqrt([5.0, 3.0, 1.0, 0.5, 0.3, 0.2, 0.1])
    return rng.standard_normal((N, DIM)) * scales @ rotation.T + rng.standard_normal(DIM)


def _reconstruction_batch(action: torch.Tensor, recon: torch.Tensor) -> TermBatch:
    """Only the fields the reconstruction term reads; the rest are unused here."""
    unused = dict.fromkeys(
        ["context", "posterior", "latent", "policy", "raw_context", "jac_lin", "ee_pos", "goal_targets",
         "belief", "limits", "dt", "epoch", "global_step"]
    )
    return TermBatch(action=action, reconstruction=recon, **unused)


def test_linear_reaches_pca_optimum():
    x_np = _data()
    x = torch.from_numpy(x_np)  # float64 so the optimiser, not round-off, limits the match
    torch.manual_seed(0)
    model = LinearDecoder(DIM, 0, latent_dim=LATENT).double()
    context = x.new_zeros(N, 0)
    term = Reconstruction()
    opt = torch.optim.LBFGS(model.parameters(), lr=1.0, max_iter=500, tolerance_grad=1e-12,
                            tolerance_change=1e-14, history_size=20, line_search_fn="strong_wolfe")

    def loss():
        return term(_reconstruction_batch(x, model.decode(model.encode(x, context).mean, context)))

    def closure():
        opt.zero_grad()
        value = loss()
        value.backward()
        return value

    for _ in range(5):
        opt.step(closure)
    with torch.no_grad():
        mse = loss().item()  # mean over samples of the squared error summed over dims

    # Eckart-Young: the best rank-2 affine reconstruction leaves exactly the discarded eigenvalues of the
    # covariance. sklearn's explained_variance_ divides by N - 1, the loss by N.
    pca = PCA(n_components=DIM).fit(x_np)
    optimum = pca.explained_variance_[LATENT:].sum() * (N - 1) / N
    np.testing.assert_allclose(mse, optimum, rtol=1e-3)

    # The decoder's columns span the top principal subspace: principal angles ~ 0 (via the projectors).
    basis, _ = np.linalg.qr(model.decoder[0].weight.detach().numpy())  # [DIM, LATENT]
    top = pca.components_[:LATENT].T  # [DIM, LATENT]
    np.testing.assert_allclose(basis @ basis.T, top @ top.T, atol=1e-3)
