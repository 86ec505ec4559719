"""MLP autoencoder detector: score = reconstruction error."""

from __future__ import annotations

from evenflag.detectors.neural.training import NeuralDetector, mlp


class AutoencoderDetector(NeuralDetector):
    """MLP autoencoder; score = mean squared reconstruction error of a row.

    Examples
    --------
    >>> import numpy as np
    >>> X = np.random.default_rng(0).normal(size=(256, 6)).astype("float32")
    >>> det = AutoencoderDetector(hidden=[16], embedding_dim=4, epochs=2, seed=0).fit(X)
    >>> det.anomaly_score(X[:3]).shape
    (3,)
    """

    def _build(self, n_features):
        self.encoder_ = mlp([n_features, *self.hidden, self.embedding_dim], self.activation, True, self.dropout)
        self.decoder_ = mlp([self.embedding_dim, *self.hidden[::-1], n_features], self.activation, True, self.dropout)

    def _parameters(self):
        return [*self.encoder_.parameters(), *self.decoder_.parameters()]

    def _detection_loss(self, xb, zb, epoch):
        errors = (self.decoder_(zb) - xb) ** 2
        self._batch_errors = (zb, errors)  # row_scores of the same batch reuses them
        return errors.mean()

    def _after_epoch(self, X, epoch):
        self._batch_errors = None  # no autograd graph kept past the epoch (nor in a saved detector)

    def _score_tensor(self, X):
        return ((self.decoder_(self.encoder_(X)) - X) ** 2).mean(dim=1)

    def row_scores(self, xb, zb):
        # A score-level penalty asks for the scores of the batch whose detection
        # loss was just computed: reuse its reconstruction (the decoder is half
        # the network) instead of running the decoder a second time.
        cached = getattr(self, "_batch_errors", None)
        if cached is not None and cached[0] is zb:
            return cached[1].mean(dim=1)
        return ((self.decoder_(zb) - xb) ** 2).mean(dim=1)
