"""The shared CPU training loop of every neural detector, and its pieces.

Built for CPU speed: the data becomes one tensor once, batches are slices of a
shuffled index, and nothing runs per row in Python. A fairness method plugs in
as a *penalty* (``penalty.start(...)`` returns a per-fit state whose
``encoder_term`` is added to the detection loss), so any neural base can be
trained with any fairness method.
"""

from __future__ import annotations

import math
import os
from typing import Any, Protocol

import numpy as np

from evenflag.errors import DetectorError

ACTIVATIONS = ("leaky_relu", "relu", "elu")
CHUNK = 8192  # rows per forward pass when scoring or embedding


def torch_module():
    import torch

    return torch


def pick_device(name: str):
    torch = torch_module()
    if name == "auto":
        return torch.device("cuda" if torch.cuda.is_available() else "cpu")
    if name.startswith("cuda") and not torch.cuda.is_available():
        raise DetectorError(f"device '{name}' asked for but CUDA is not available; use device=cpu or device=auto")
    return torch.device(name)


def _activation(name: str):
    nn = torch_module().nn
    if name not in ACTIVATIONS:
        raise DetectorError(f"activation '{name}' is unknown; use one of {list(ACTIVATIONS)}")
    return {"leaky_relu": lambda: nn.LeakyReLU(0.01), "relu": nn.ReLU, "elu": nn.ELU}[name]()


def mlp(sizes: list[int], activation: str, bias: bool, dropout: float = 0.0, last_activation: bool = False):
    """Linear layers of the given sizes with an activation between them."""
    nn = torch_module().nn
    layers: list[Any] = []
    for i, (a, b) in enumerate(zip(sizes[:-1], sizes[1:])):
        layers.append(nn.Linear(a, b, bias=bias))
        if i < len(sizes) - 2 or last_activation:
            layers.append(_activation(activation))
            if dropout > 0:
                layers.append(nn.Dropout(dropout))
    return nn.Sequential(*layers)


def set_threads_from_env() -> None:
    threads = int(os.environ.get("EVENFLAG_THREADS", "0") or 0)
    if threads:
        torch_module().set_num_threads(threads)


def group_codes(group, who: str, min_rows: int = 2) -> tuple[list[str], np.ndarray]:
    """Group values and integer codes of the training rows, refusing what a
    fairness method cannot train on: no groups, one group, or a group with
    fewer than ``min_rows`` rows."""
    if group is None:
        raise DetectorError(f"{who} needs the group of each training row")
    values, codes = np.unique(np.asarray(group).astype(str), return_inverse=True)
    if len(values) < 2:
        raise DetectorError(f"{who} needs at least two group values, got {list(values)}")
    counts = np.bincount(codes, minlength=len(values))
    small = {str(v): int(c) for v, c in zip(values, counts) if c < min_rows}
    if small:
        raise DetectorError(f"{who} needs at least {min_rows} training rows per group value; too few: {small}; "
                            "merge small groups (dataset.small_groups=merge with dataset.min_group_size) or use a "
                            "coarser group column")
    return [str(v) for v in values], codes.astype(np.int64)


class PenaltyState(Protocol):
    """What the training loop asks of a fairness penalty during one fit.
    Optional: ``batches(n, batch_size, generator)`` (its own batch sampler) and
    ``before_epoch(X, encode)`` (called before each epoch with the training
    rows and the encoder's differentiable map of a tensor of rows)."""

    def before_encoder_step(self, zb, idx) -> None: ...

    def encoder_term(self, xb, zb, idx, epoch: int, detector): ...

    def after_encoder_step(self) -> None: ...

    def epoch_summary(self) -> dict[str, float]: ...


class NeuralDetector:
    """Shared training loop. Subclasses define the network and the detection loss.

    A subclass defines ``_build(n_features)`` (creating ``encoder_`` and
    optionally ``decoder_``), ``_parameters()``, ``_detection_loss(xb, zb, epoch)``
    and ``_score_tensor(X)``; optionally ``_prepare_objective(X)`` and
    ``_after_epoch(X, epoch)``. ``fit(X, group, penalty=...)`` trains it with a
    fairness penalty (see :mod:`evenflag.detectors.neural.fairness`).
    """

    def __init__(self, hidden: list[int] | None = None, embedding_dim: int = 32, activation: str = "leaky_relu",
                 dropout: float = 0.0, epochs: int = 30, batch_size: int = 256, lr: float = 1e-3,
                 weight_decay: float = 1e-6, early_stopping: int | None = None, device: str = "cpu",
                 seed: int = 0):
        self.hidden = list(hidden) if hidden is not None else [128, 64]
        self.embedding_dim = embedding_dim
        self.activation = activation
        self.dropout = dropout
        self.epochs = epochs
        self.batch_size = batch_size
        self.lr = lr
        self.weight_decay = weight_decay
        self.early_stopping = early_stopping
        self.device = device
        self.seed = seed
        if activation not in ACTIVATIONS:
            raise DetectorError(f"activation '{activation}' is unknown; use one of {list(ACTIVATIONS)}")
        for key, value in (("epochs", epochs), ("batch_size", batch_size), ("embedding_dim", embedding_dim)):
            if not isinstance(value, int) or value < 1:
                raise DetectorError(f"detector.{key} must be a whole number of at least 1, got {value!r}")
        if not lr > 0:
            raise DetectorError(f"detector.lr must be positive, got {lr!r}")

    # -- hooks for subclasses -------------------------------------------------
    def _build(self, n_features: int) -> None:
        raise NotImplementedError

    def _parameters(self):
        raise NotImplementedError

    def _prepare_objective(self, X) -> None:
        """Before the main epochs (e.g. pretraining, the hypersphere centre)."""

    def _detection_loss(self, xb, zb, epoch: int):
        raise NotImplementedError

    def _after_epoch(self, X, epoch: int) -> None:
        """After each epoch (e.g. the soft-boundary radius)."""

    def _score_tensor(self, X):
        raise NotImplementedError

    def _encode(self, X):
        return self.encoder_(X)

    def row_scores(self, xb, zb):
        """Differentiable anomaly scores of a batch (for score-level penalties)."""
        return self._score_tensor(xb)

    # -- public contract ------------------------------------------------------
    def fit(self, X, group=None, penalty=None):
        """Train on ``X``; ``penalty`` (a fairness method) adds its term to the
        detection loss and needs ``group``."""
        torch = torch_module()
        set_threads_from_env()
        torch.manual_seed(self.seed)
        generator = torch.Generator().manual_seed(self.seed)
        self.device_ = pick_device(self.device)
        X = self._tensor(X)
        if len(X) < 2:
            raise DetectorError("at least 2 training rows are needed")
        self.n_features_in_ = X.shape[1]
        self._build(X.shape[1])
        for module in self._modules():
            module.to(self.device_)
        self._prepare_objective(X)
        optimizer = torch.optim.Adam(self._parameters(), lr=self.lr, weight_decay=self.weight_decay, foreach=True)
        state = penalty.start(group, self, self.device_) if penalty is not None else None
        self.history_ = []
        best, stale = math.inf, 0
        for epoch in range(self.epochs):
            self._train_mode()
            total = torch.zeros((), device=self.device_)
            if state is not None and hasattr(state, "before_epoch"):
                state.before_epoch(X, self._encode)
            for idx in (state.batches(len(X), self.batch_size, generator) if state is not None and
                        hasattr(state, "batches") else self._batches(len(X), generator)):
                xb = X[idx]
                zb = self._encode(xb)
                if state is not None:
                    state.before_encoder_step(zb.detach(), idx)
                loss = self._detection_loss(xb, zb, epoch)
                objective = loss if state is None else loss + state.encoder_term(xb, zb, idx, epoch, self)
                optimizer.zero_grad(set_to_none=True)
                objective.backward()
                optimizer.step()
                if state is not None:
                    state.after_encoder_step()
                total = total + loss.detach() * len(idx)
            epoch_loss = float(total) / len(X)
            if not math.isfinite(epoch_loss):
                raise DetectorError(f"training loss became {epoch_loss} at epoch {epoch + 1}; lower lr or check the features")
            self._after_epoch(X, epoch)
            row = {"detection_loss": epoch_loss}
            if state is not None:
                row.update(state.epoch_summary())
            self.history_.append(row)
            if self.early_stopping:
                if epoch_loss < best - 1e-6:
                    best, stale = epoch_loss, 0
                else:
                    stale += 1
                    if stale >= self.early_stopping:
                        break
        if state is not None:
            self._check_collapse(X)
        return self

    def anomaly_score(self, X) -> np.ndarray:
        torch = torch_module()
        X = self._tensor(X)
        with torch.no_grad():
            self._eval()
            scores = torch.cat([self._score_tensor(X[i:i + CHUNK]) for i in range(0, len(X), CHUNK)])
        return scores.cpu().numpy().astype(np.float64)

    def embed(self, X) -> np.ndarray:
        torch = torch_module()
        X = self._tensor(X)
        with torch.no_grad():
            self._eval()
            return torch.cat([self._encode(X[i:i + CHUNK]) for i in range(0, len(X), CHUNK)]).cpu().numpy()

    # -- machinery --------------------------------------------------------------
    def _eval(self):
        for module in self._modules():
            module.eval()

    def _train_mode(self):
        for module in self._modules():
            module.train()

    def _modules(self):
        return [m for m in (getattr(self, "encoder_", None), getattr(self, "decoder_", None)) if m is not None]

    def _tensor(self, X):
        torch = torch_module()
        X = np.asarray(X, dtype=np.float32)
        if X.ndim != 2:
            raise DetectorError(f"X must be 2-d (rows x features), got shape {X.shape}")
        if hasattr(self, "n_features_in_") and X.shape[1] != self.n_features_in_:
            raise DetectorError(f"X has {X.shape[1]} features but the detector was fitted on {self.n_features_in_}")
        return torch.from_numpy(X).to(self.device_ if hasattr(self, "device_") else pick_device(self.device))

    def _batches(self, n: int, generator):
        """Shuffled index batches. A last batch of one row joins the batch before
        it: batch statistics (the adversary's BatchNorm) need two rows."""
        torch = torch_module()
        order = torch.randperm(n, generator=generator)
        batches = [order[i:i + self.batch_size] for i in range(0, n, self.batch_size)]
        if len(batches) > 1 and len(batches[-1]) == 1:
            batches[-2:] = [torch.cat(batches[-2:])]
        return batches

    def _check_collapse(self, X) -> None:
        embedding = self.embed(X[: min(len(X), 20000)].cpu().numpy())
        variance = float(embedding.var(axis=0).mean())
        if not np.isfinite(variance) or variance < 1e-8:
            raise DetectorError(
                f"the embedding collapsed (mean variance {variance:.2e}): its fairness numbers would be meaningless; "
                "lower detector.weight or lr, or add warm-up epochs")
