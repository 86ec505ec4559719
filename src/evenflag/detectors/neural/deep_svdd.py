"""Deep SVDD (Ruff et al., ICML 2018): one-class or soft-boundary objective."""

from __future__ import annotations

import numpy as np

from evenflag.detectors.neural.training import NeuralDetector, mlp, torch_module
from evenflag.errors import DetectorError


class DeepSVDDDetector(NeuralDetector):
    """Deep SVDD: map normal rows close to a centre ``c``; score = squared distance.

    Bias-free layers and unbounded activations (a network with bias terms, or
    bounded activations, can map everything onto ``c`` and collapse the
    hypersphere). The centre is the mean of an initial forward pass, with
    coordinates closer to 0 than ``eps`` pushed to ``+/- eps`` (an exact 0 goes
    to ``+eps``). ``objective="soft_boundary"`` also learns a radius ``R``: after
    ``warmup_epochs`` it is set each epoch to the ``1 - nu`` quantile of the
    distances (not squared distances); the score is then ``dist^2 - R^2``.

    Examples
    --------
    >>> import numpy as np
    >>> X = np.random.default_rng(0).normal(size=(256, 6)).astype("float32")
    >>> det = DeepSVDDDetector(hidden=[16], embedding_dim=4, epochs=2, seed=0).fit(X)
    >>> bool((np.abs(det.center_) >= det.eps).all())
    True
    """

    def __init__(self, objective: str = "one_class", nu: float = 0.1, eps: float = 0.1, warmup_epochs: int = 5,
                 pretrain_epochs: int = 0, hidden: list[int] | None = None, embedding_dim: int = 32,
                 activation: str = "leaky_relu", dropout: float = 0.0, epochs: int = 30, batch_size: int = 256,
                 lr: float = 1e-3, weight_decay: float = 1e-6, early_stopping: int | None = None,
                 device: str = "cpu", seed: int = 0):
        super().__init__(hidden=hidden, embedding_dim=embedding_dim, activation=activation, dropout=dropout,
                         epochs=epochs, batch_size=batch_size, lr=lr, weight_decay=weight_decay,
                         early_stopping=early_stopping, device=device, seed=seed)
        if objective not in ("one_class", "soft_boundary"):
            raise DetectorError(f"objective '{objective}' is unknown; use one_class or soft_boundary")
        if not 0 < nu <= 1:
            raise DetectorError(f"nu must be in (0, 1], got {nu}")
        self.objective = objective
        self.nu = nu
        self.eps = eps
        self.warmup_epochs = warmup_epochs
        self.pretrain_epochs = pretrain_epochs

    def _build(self, n_features):
        self.encoder_ = mlp([n_features, *self.hidden, self.embedding_dim], self.activation, bias=False)
        self.decoder_ = None

    def _modules(self):
        return [m for m in (getattr(self, "encoder_", None), getattr(self, "pretrain_decoder_", None)) if m is not None]

    def _parameters(self):
        return list(self.encoder_.parameters())

    def _prepare_objective(self, X):
        torch = torch_module()
        if self.pretrain_epochs:
            self._pretrain(X)
        with torch.no_grad():
            self.encoder_.eval()
            z = torch.cat([self.encoder_(X[i:i + 8192]) for i in range(0, len(X), 8192)])
            self.center_tensor_ = center_from_mean(z.mean(dim=0), self.eps)
        self.center_ = self.center_tensor_.cpu().numpy()
        self.radius_ = 0.0

    def _pretrain(self, X):
        """Autoencoder pretraining of the encoder with a bias-free mirrored decoder."""
        torch = torch_module()
        self.pretrain_decoder_ = mlp([self.embedding_dim, *self.hidden[::-1], X.shape[1]], self.activation, bias=False).to(X.device)
        params = [*self.encoder_.parameters(), *self.pretrain_decoder_.parameters()]
        optimizer = torch.optim.Adam(params, lr=self.lr, weight_decay=self.weight_decay)
        generator = torch.Generator().manual_seed(self.seed + 1)
        for _ in range(self.pretrain_epochs):
            for idx in self._batches(len(X), generator):
                xb = X[idx]
                loss = ((self.pretrain_decoder_(self.encoder_(xb)) - xb) ** 2).mean()
                optimizer.zero_grad(set_to_none=True)
                loss.backward()
                optimizer.step()
        self.pretrain_decoder_ = None

    def _distances(self, z):
        return ((z - self.center_tensor_) ** 2).sum(dim=1)

    def _detection_loss(self, xb, zb, epoch):
        dist = self._distances(zb)
        if self.objective == "soft_boundary":
            torch = torch_module()
            r2 = self.radius_ ** 2
            return r2 + (1.0 / self.nu) * torch.clamp(dist - r2, min=0).mean()
        return dist.mean()

    def _after_epoch(self, X, epoch):
        if self.objective == "soft_boundary" and epoch + 1 >= self.warmup_epochs:
            torch = torch_module()
            with torch.no_grad():
                self.encoder_.eval()
                dist = torch.cat([self._distances(self.encoder_(X[i:i + 8192])) for i in range(0, len(X), 8192)])
            self.radius_ = radius_from_distances(dist.cpu().numpy(), self.nu)

    def _score_tensor(self, X):
        dist = self._distances(self.encoder_(X))
        return dist - self.radius_ ** 2 if self.objective == "soft_boundary" else dist

    def row_scores(self, xb, zb):
        dist = self._distances(zb)  # the batch's embedding is at hand: no second encoder pass
        return dist - self.radius_ ** 2 if self.objective == "soft_boundary" else dist


def center_from_mean(mean, eps: float):
    """The hypersphere centre: coordinates with ``|c_j| < eps`` are pushed to
    ``eps`` with their sign kept (an exact 0 goes to ``+eps``), so that the
    centre is not trivially reachable by zero weights."""
    c = mean.clone()
    small = c.abs() < eps
    c[small & (c < 0)] = -eps
    c[small & (c >= 0)] = eps
    return c


def radius_from_distances(sq_distances: np.ndarray, nu: float) -> float:
    """Soft-boundary radius: the ``1 - nu`` quantile of the distances (square
    roots of the squared distances)."""
    return float(np.quantile(np.sqrt(np.asarray(sq_distances, dtype=np.float64)), 1.0 - nu))
