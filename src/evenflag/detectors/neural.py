"""Neural detectors (torch, CPU by default; CUDA only when present and asked for).

* :class:`AutoencoderDetector`: score = reconstruction error.
* :class:`DeepSVDDDetector`: Deep SVDD (Ruff et al., ICML 2018), one-class or
  soft-boundary objective; score = squared distance to the hypersphere centre
  (minus R squared for soft-boundary).
* :class:`AdversarialDetector`: either of them trained with an adversary that
  predicts the group from the embedding; the encoder minimises its detection
  loss minus ``weight`` times the adversary's loss.

The training loop is built for CPU speed: the data becomes one tensor once,
batches are slices of a shuffled index, and nothing runs per row in Python.
"""

from __future__ import annotations

import math
import os
from typing import Any

import numpy as np

from evenflag.errors import DetectorError

ACTIVATIONS = ("leaky_relu", "relu", "elu")


def _torch():
    import torch

    return torch


def _device(name: str):
    torch = _torch()
    if name == "auto":
        return torch.device("cuda" if torch.cuda.is_available() else "cpu")
    if name.startswith("cuda") and not torch.cuda.is_available():
        raise DetectorError(f"device '{name}' asked for but CUDA is not available; use device=cpu or device=auto")
    return torch.device(name)


def _activation(name: str):
    nn = _torch().nn
    if name not in ACTIVATIONS:
        raise DetectorError(f"activation '{name}' is unknown; use one of {list(ACTIVATIONS)}")
    return {"leaky_relu": lambda: nn.LeakyReLU(0.01), "relu": nn.ReLU, "elu": nn.ELU}[name]()


def mlp(sizes: list[int], activation: str, bias: bool, dropout: float = 0.0, last_activation: bool = False):
    """Linear layers of the given sizes with an activation between them."""
    nn = _torch().nn
    layers: list[Any] = []
    for i, (a, b) in enumerate(zip(sizes[:-1], sizes[1:])):
        layers.append(nn.Linear(a, b, bias=bias))
        if i < len(sizes) - 2 or last_activation:
            layers.append(_activation(activation))
            if dropout > 0:
                layers.append(nn.Dropout(dropout))
    return nn.Sequential(*layers)


def _set_threads() -> None:
    threads = int(os.environ.get("EVENFLAG_THREADS", "0") or 0)
    if threads:
        _torch().set_num_threads(threads)


class _NeuralDetector:
    """Shared training loop. Subclasses define the network and the detection loss."""

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

    # -- public contract ------------------------------------------------------
    def fit(self, X, group=None):
        return self._train(X, group, adversary=None)

    def anomaly_score(self, X) -> np.ndarray:
        torch = _torch()
        X = self._tensor(X)
        with torch.no_grad():
            self._eval()
            scores = torch.cat([self._score_tensor(X[i:i + 8192]) for i in range(0, len(X), 8192)])
        return scores.cpu().numpy().astype(np.float64)

    def embed(self, X) -> np.ndarray:
        torch = _torch()
        X = self._tensor(X)
        with torch.no_grad():
            self._eval()
            return torch.cat([self._encode(X[i:i + 8192]) for i in range(0, len(X), 8192)]).cpu().numpy()

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
        torch = _torch()
        X = np.asarray(X, dtype=np.float32)
        if X.ndim != 2:
            raise DetectorError(f"X must be 2-d (rows x features), got shape {X.shape}")
        if hasattr(self, "n_features_in_") and X.shape[1] != self.n_features_in_:
            raise DetectorError(f"X has {X.shape[1]} features but the detector was fitted on {self.n_features_in_}")
        return torch.from_numpy(X).to(self.device_ if hasattr(self, "device_") else _device(self.device))

    def _batches(self, n: int, generator):
        """Shuffled index batches. A last batch of one row joins the batch before
        it: batch statistics (the adversary's BatchNorm) need two rows."""
        torch = _torch()
        order = torch.randperm(n, generator=generator)
        batches = [order[i:i + self.batch_size] for i in range(0, n, self.batch_size)]
        if len(batches) > 1 and len(batches[-1]) == 1:
            batches[-2:] = [torch.cat(batches[-2:])]
        return batches

    def _train(self, X, group, adversary: "AdversarySpec | None"):
        torch = _torch()
        _set_threads()
        torch.manual_seed(self.seed)
        generator = torch.Generator().manual_seed(self.seed)
        self.device_ = _device(self.device)
        X = self._tensor(X)
        if len(X) < 2:
            raise DetectorError("at least 2 training rows are needed")
        self.n_features_in_ = X.shape[1]
        self._build(X.shape[1])
        for module in self._modules():
            module.to(self.device_)
        self._prepare_objective(X)
        optimizer = torch.optim.Adam(self._parameters(), lr=self.lr, weight_decay=self.weight_decay, foreach=True)
        adv = adversary.start(group, self.embedding_dim, self.device_) if adversary is not None else None
        self.history_ = []
        best, stale = math.inf, 0
        for epoch in range(self.epochs):
            self._train_mode()
            total = torch.zeros((), device=self.device_)
            for idx in self._batches(len(X), generator):
                xb = X[idx]
                zb = self._encode(xb)
                if adv is not None:
                    adv.adversary_steps(zb.detach(), idx)
                loss = self._detection_loss(xb, zb, epoch)
                objective = loss if adv is None else loss + adv.encoder_term(zb, idx, epoch)
                optimizer.zero_grad(set_to_none=True)
                objective.backward()
                optimizer.step()
                if adv is not None:
                    adv.after_encoder_step()
                total = total + loss.detach() * len(idx)
            epoch_loss = float(total) / len(X)
            if not math.isfinite(epoch_loss):
                raise DetectorError(f"training loss became {epoch_loss} at epoch {epoch + 1}; lower lr or check the features")
            self._after_epoch(X, epoch)
            row = {"detection_loss": epoch_loss}
            if adv is not None:
                row.update(adv.epoch_summary())
            self.history_.append(row)
            if self.early_stopping:
                if epoch_loss < best - 1e-6:
                    best, stale = epoch_loss, 0
                else:
                    stale += 1
                    if stale >= self.early_stopping:
                        break
        if adv is not None:
            self._check_collapse(X)
        return self

    def _check_collapse(self, X) -> None:
        embedding = self.embed(X[: min(len(X), 20000)].cpu().numpy())
        variance = float(embedding.var(axis=0).mean())
        if not np.isfinite(variance) or variance < 1e-8:
            raise DetectorError(
                f"the embedding collapsed (mean variance {variance:.2e}): its fairness numbers would be meaningless; "
                "lower detector.weight or lr, or add warm-up epochs")


class AutoencoderDetector(_NeuralDetector):
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
        return ((self.decoder_(zb) - xb) ** 2).mean()

    def _score_tensor(self, X):
        return ((self.decoder_(self.encoder_(X)) - X) ** 2).mean(dim=1)


class DeepSVDDDetector(_NeuralDetector):
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
        torch = _torch()
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
        torch = _torch()
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
            torch = _torch()
            r2 = self.radius_ ** 2
            return r2 + (1.0 / self.nu) * torch.clamp(dist - r2, min=0).mean()
        return dist.mean()

    def _after_epoch(self, X, epoch):
        if self.objective == "soft_boundary" and epoch + 1 >= self.warmup_epochs:
            torch = _torch()
            with torch.no_grad():
                self.encoder_.eval()
                dist = torch.cat([self._distances(self.encoder_(X[i:i + 8192])) for i in range(0, len(X), 8192)])
            self.radius_ = radius_from_distances(dist.cpu().numpy(), self.nu)

    def _score_tensor(self, X):
        dist = self._distances(self.encoder_(X))
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


# ---------------------------------------------------------------- adversarial
class AdversarySpec:
    """An adversary that predicts the group from the embedding (softmax over
    every group value, so binary, multi-valued and intersectional groups work
    alike), and the term it adds to the encoder's objective."""

    def __init__(self, weight, hidden, steps, warmup_epochs, ramp_epochs, mode, lr, seed):
        self.weight, self.hidden, self.steps = weight, hidden, steps
        self.warmup_epochs, self.ramp_epochs, self.mode, self.lr, self.seed = warmup_epochs, ramp_epochs, mode, lr, seed

    def start(self, group, embedding_dim: int, device):
        return _AdversaryState(self, group, embedding_dim, device)


_REVERSAL = None


def _gradient_reversal(z, scale: float):
    """Identity forward; the gradient is multiplied by ``-scale`` on the way back."""
    global _REVERSAL
    torch = _torch()
    if _REVERSAL is None:
        class Reverse(torch.autograd.Function):
            @staticmethod
            def forward(ctx, x, factor):
                ctx.factor = factor
                return x.view_as(x)

            @staticmethod
            def backward(ctx, grad):
                return -ctx.factor * grad, None

        _REVERSAL = Reverse
    return _REVERSAL.apply(z, scale)


class _AdversaryState:
    def __init__(self, spec: AdversarySpec, group, embedding_dim: int, device):
        torch = _torch()
        if group is None:
            raise DetectorError("the adversarial detector needs the group of each training row")
        values, codes = np.unique(np.asarray(group).astype(str), return_inverse=True)
        if len(values) < 2:
            raise DetectorError(f"the adversary needs at least two group values, got {list(values)}")
        self.spec = spec
        self.group_values_ = list(values)
        self.codes = torch.from_numpy(codes.astype(np.int64)).to(device)
        self.baseline = float(np.bincount(codes).max() / len(codes))
        torch.manual_seed(spec.seed + 7)
        # Embeddings of a hypersphere model are tiny in scale; standardising them
        # at the adversary's input (batch statistics) lets it learn at all.
        self.net = torch.nn.Sequential(
            torch.nn.BatchNorm1d(embedding_dim, affine=False),
            mlp([embedding_dim, *spec.hidden, len(values)], "relu", bias=True, last_activation=False),
        ).to(device)
        self.optimizer = torch.optim.Adam(self.net.parameters(), lr=spec.lr, foreach=True)
        self.loss_fn = torch.nn.CrossEntropyLoss()
        self.epoch = 0
        self._loss_sum = torch.zeros((), device=device)
        self._correct = torch.zeros((), device=device)
        self._seen = 0

    def current_weight(self, epoch: int) -> float:
        spec = self.spec
        if epoch < spec.warmup_epochs:
            return 0.0
        if spec.ramp_epochs:
            return spec.weight * min(1.0, (epoch - spec.warmup_epochs + 1) / spec.ramp_epochs)
        return spec.weight

    def adversary_steps(self, z, idx):
        """Update the adversary on the batch's (detached) embedding: the encoder
        is frozen for these steps (alternating mode)."""
        if self.spec.mode != "alternating":
            return
        target = self.codes[idx]
        for _ in range(self.spec.steps):
            loss = self.loss_fn(self.net(z), target)
            self.optimizer.zero_grad(set_to_none=True)
            loss.backward()
            self.optimizer.step()

    def encoder_term(self, zb, idx, epoch: int):
        """What the encoder adds to its loss: minus weight x the adversary's loss."""
        torch = _torch()
        target = self.codes[idx]
        weight = self.current_weight(epoch)
        if self.spec.mode == "gradient_reversal":
            # One backward pass trains the adversary to predict the group and,
            # through the reversed gradient, the encoder to hide it.
            logits = self.net(_gradient_reversal(zb, weight))
            loss = self.loss_fn(logits, target)
            self.optimizer.zero_grad(set_to_none=True)  # filled by the encoder's backward pass
            term = loss
        else:
            for p in self.net.parameters():
                p.requires_grad_(False)
            logits = self.net(zb)
            loss = self.loss_fn(logits, target)
            for p in self.net.parameters():
                p.requires_grad_(True)
            term = -weight * loss
        with torch.no_grad():
            self._loss_sum += loss.detach() * len(idx)
            self._correct += (logits.argmax(dim=1) == target).sum()
            self._seen += len(idx)
        return term

    def after_encoder_step(self):
        if self.spec.mode == "gradient_reversal":
            self.optimizer.step()

    def epoch_summary(self) -> dict[str, float]:
        torch = _torch()
        seen = max(self._seen, 1)
        row = {"adversary_loss": float(self._loss_sum) / seen, "adversary_accuracy": float(self._correct) / seen,
               "adversary_baseline": self.baseline, "adversary_weight": self.current_weight(self.epoch)}
        self._loss_sum = torch.zeros_like(self._loss_sum)
        self._correct = torch.zeros_like(self._correct)
        self._seen = 0
        self.epoch += 1
        return row


class AdversarialDetector:
    """A neural detector trained so that its embedding hides the group.

    Parameters
    ----------
    base : dict
        The neural base: ``{"name": "deep_svdd", ...settings}`` or ``autoencoder``.
    weight : float
        Strength of the fairness term: the encoder minimises
        ``detection loss - weight * adversary loss``.
    adversary_hidden : list of int
        Hidden layer widths of the adversary (its depth is their number).
    adversary_steps : int
        Adversary updates per encoder update (``mode="alternating"``). A slow
        adversary lets the encoder "win" by making it confidently wrong, which
        still leaks the group; several quick steps keep it honest.
    warmup_epochs, ramp_epochs : int
        Epochs before the adversarial term starts, then epochs of a linear
        ramp of the weight up to ``weight``.
    mode : str
        ``alternating`` (adversary frozen during the encoder step) or
        ``gradient_reversal`` (one backward pass through a reversal layer).
    """

    def __init__(self, base: dict | None = None, weight: float = 1.0, adversary_hidden: list[int] | None = None,
                 adversary_steps: int = 2, warmup_epochs: int = 0, ramp_epochs: int = 0, mode: str = "alternating",
                 adversary_lr: float = 1e-2, seed: int = 0):
        if mode not in ("alternating", "gradient_reversal"):
            raise DetectorError(f"mode '{mode}' is unknown; use alternating or gradient_reversal")
        if weight < 0:
            raise DetectorError(f"weight must be >= 0, got {weight}")
        self.base = dict(base or {"name": "deep_svdd"})
        self.weight = weight
        self.adversary_hidden = list(adversary_hidden) if adversary_hidden is not None else [32]
        self.adversary_steps = adversary_steps
        self.warmup_epochs = warmup_epochs
        self.ramp_epochs = ramp_epochs
        self.mode = mode
        self.adversary_lr = adversary_lr
        self.seed = seed

    def check_settings(self) -> None:
        """Build the base detector (its argument checks) without data."""
        self._base_detector()

    def _base_detector(self):
        settings = dict(self.base)
        name = settings.pop("name", "deep_svdd")
        classes = {"deep_svdd": DeepSVDDDetector, "autoencoder": AutoencoderDetector}
        if name not in classes:
            raise DetectorError(f"adversarial base '{name}' is unknown; use one of {sorted(classes)}")
        settings["seed"] = self.seed
        import inspect

        allowed = set(inspect.signature(classes[name].__init__).parameters) | set(
            inspect.signature(_NeuralDetector.__init__).parameters)
        unknown = sorted(set(settings) - allowed)
        if unknown:
            raise DetectorError(f"adversarial base '{name}' has no setting {unknown}; "
                                f"allowed: {', '.join(sorted(allowed - {'self', 'kwargs', 'seed'}))}")
        return classes[name](**settings)

    def fit(self, X, group=None):
        self.base_ = self._base_detector()
        spec = AdversarySpec(self.weight, self.adversary_hidden, self.adversary_steps, self.warmup_epochs,
                             self.ramp_epochs, self.mode, self.adversary_lr, self.seed)
        self.base_._train(X, group, adversary=spec)
        self.history_ = self.base_.history_
        return self

    def anomaly_score(self, X):
        return self.base_.anomaly_score(X)

    def embed(self, X):
        return self.base_.embed(X)
