"""Fairness-aware training of any neural detector.

A *penalty* adds a term to the detection loss of a :class:`NeuralDetector`
during ``fit``; a *wrapper* detector builds its base detector through the
detector registry (``base: {name: deep_svdd, ...}``, or any registered neural
plugin) and trains it with its penalty:

* :class:`AdversarialDetector` (``adversarial``): adversaries predict the group
  from the embedding; the encoder is trained so that they cannot.
* :class:`DistributionMatchingDetector` (``distribution_matching``): the maximum
  mean discrepancy between the groups' embeddings (Gretton et al., JMLR 2012)
  is added to the loss, so the groups' embeddings are pulled to one
  distribution.

Every penalty works with binary, multi-valued and intersectional groups, logs
per-epoch curves (``train.*`` metrics) and refuses a group too small to train
on. ``weight=0`` trains the base exactly as it trains alone.
"""

from __future__ import annotations

import numpy as np

from evenflag.detectors.neural.training import NeuralDetector, group_codes, mlp, torch_module
from evenflag.errors import DetectorError

ENCODER_TARGETS = ("confusion", "maximise")
MODES = ("alternating", "gradient_reversal")


def _ramped(weight: float, epoch: int, warmup_epochs: int, ramp_epochs: int) -> float:
    """The penalty's weight at an epoch: 0 during warm-up, then a linear ramp."""
    if epoch < warmup_epochs:
        return 0.0
    if ramp_epochs:
        return weight * min(1.0, (epoch - warmup_epochs + 1) / ramp_epochs)
    return weight


# ---------------------------------------------------------------- adversary
_REVERSAL = None


def _gradient_reversal(z, scale: float):
    """Identity forward; the gradient is multiplied by ``-scale`` on the way back."""
    global _REVERSAL
    torch = torch_module()
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


class AdversaryPenalty:
    """Adversaries that predict the group from the embedding (softmax over every
    group value), and the term the encoder adds to its loss."""

    def __init__(self, weight: float, hidden: list[int], steps: int, lr: float, warmup_epochs: int,
                 ramp_epochs: int, mode: str, encoder_target: str, n_adversaries: int, reinit_every: int, seed: int):
        self.weight, self.hidden, self.steps, self.lr = weight, list(hidden), steps, lr
        self.warmup_epochs, self.ramp_epochs, self.mode = warmup_epochs, ramp_epochs, mode
        self.encoder_target, self.n_adversaries, self.reinit_every, self.seed = (encoder_target, n_adversaries,
                                                                                 reinit_every, seed)

    def start(self, group, detector: NeuralDetector, device):
        return _AdversaryState(self, group, detector.embedding_dim, device)


class _AdversaryState:
    def __init__(self, spec: AdversaryPenalty, group, embedding_dim: int, device):
        torch = torch_module()
        values, codes = group_codes(group, "the adversarial detector")
        self.spec, self.device, self.embedding_dim = spec, device, embedding_dim
        self.group_values_ = values
        self.codes = torch.from_numpy(codes).to(device)
        counts = np.bincount(codes, minlength=len(values))
        self.prior = torch.from_numpy(counts / counts.sum()).float().to(device)
        self.baseline = float(counts.max() / counts.sum())
        self.loss_fn = torch.nn.CrossEntropyLoss()
        self.epoch = 0
        self._build()
        self._loss_sum = torch.zeros((), device=device)
        self._correct = torch.zeros((), device=device)
        self._seen = 0

    def _build(self):
        torch = torch_module()
        # A private random stream, so that the base's own training is untouched.
        with torch.random.fork_rng(devices=[]):
            torch.manual_seed(self.spec.seed + 7 + 1000 * self.epoch)
            # Embeddings of a hypersphere model are tiny in scale; standardising them
            # at the adversary's input (batch statistics) lets it learn at all.
            self.nets = [torch.nn.Sequential(
                torch.nn.BatchNorm1d(self.embedding_dim, affine=False),
                mlp([self.embedding_dim, *self.spec.hidden, len(self.group_values_)], "relu", bias=True),
            ).to(self.device) for _ in range(self.spec.n_adversaries)]
        self.optimizers = [torch.optim.Adam(net.parameters(), lr=self.spec.lr, foreach=True) for net in self.nets]

    def current_weight(self, epoch: int) -> float:
        return _ramped(self.spec.weight, epoch, self.spec.warmup_epochs, self.spec.ramp_epochs)

    def before_encoder_step(self, z, idx):
        """Train every adversary on the batch's detached embedding (alternating mode)."""
        if self.spec.mode != "alternating":
            return
        target = self.codes[idx]
        for net, optimizer in zip(self.nets, self.optimizers):
            for _ in range(self.spec.steps):
                loss = self.loss_fn(net(z), target)
                optimizer.zero_grad(set_to_none=True)
                loss.backward()
                optimizer.step()

    def encoder_term(self, xb, zb, idx, epoch: int, detector):
        torch = torch_module()
        target = self.codes[idx]
        weight = self.current_weight(epoch)
        if self.spec.mode == "gradient_reversal":
            # One backward pass trains the adversaries to predict the group and,
            # through the reversed gradient, the encoder to hide it.
            reversed_z = _gradient_reversal(zb, weight)
            logits_all = [net(reversed_z) for net in self.nets]
            for optimizer in self.optimizers:
                optimizer.zero_grad(set_to_none=True)  # filled by the encoder's backward pass
            loss = sum(self.loss_fn(logits, target) for logits in logits_all) / len(self.nets)
            term = loss
        else:
            for net in self.nets:
                for p in net.parameters():
                    p.requires_grad_(False)
            logits_all = [net(zb) for net in self.nets]
            for net in self.nets:
                for p in net.parameters():
                    p.requires_grad_(True)
            loss = sum(self.loss_fn(logits, target) for logits in logits_all) / len(self.nets)
            if self.spec.encoder_target == "confusion":
                # Push every adversary's prediction to the group prior: the encoder
                # wins only when the adversaries cannot tell, not when they are
                # confidently wrong (which still leaks the group).
                log_p = torch.stack([torch.log_softmax(logits, dim=1) for logits in logits_all])
                term = weight * -(self.prior * log_p).sum(dim=-1).mean()
            else:
                term = -weight * loss
        with torch.no_grad():
            logits = logits_all[0]
            self._loss_sum += loss.detach() * len(idx)
            self._correct += (logits.argmax(dim=1) == target).sum()
            self._seen += len(idx)
        return term

    def after_encoder_step(self):
        if self.spec.mode == "gradient_reversal":
            for optimizer in self.optimizers:
                optimizer.step()

    def epoch_summary(self) -> dict[str, float]:
        torch = torch_module()
        seen = max(self._seen, 1)
        row = {"adversary_loss": float(self._loss_sum) / seen, "adversary_accuracy": float(self._correct) / seen,
               "adversary_baseline": self.baseline, "adversary_weight": self.current_weight(self.epoch)}
        self._loss_sum = torch.zeros_like(self._loss_sum)
        self._correct = torch.zeros_like(self._correct)
        self._seen = 0
        self.epoch += 1
        if self.spec.reinit_every and self.epoch % self.spec.reinit_every == 0:
            self._build()  # fresh adversaries: the encoder cannot settle on fooling one
        return row


class MonitorProbe:
    """A linear probe that learns the group from the (detached) embedding while
    the detector trains, one step per batch, only to log how much group
    information the embedding carries (``probe_accuracy`` against the
    majority-group ``probe_baseline``). It never changes the detector."""

    def __init__(self, codes, n_groups: int, embedding_dim: int, device, seed: int):
        torch = torch_module()
        self.codes = codes
        counts = torch.bincount(codes, minlength=n_groups)
        self.baseline = float(counts.max()) / float(counts.sum())
        with torch.random.fork_rng(devices=[]):
            torch.manual_seed(seed + 11)
            self.net = torch.nn.Sequential(torch.nn.BatchNorm1d(embedding_dim, affine=False),
                                           torch.nn.Linear(embedding_dim, n_groups)).to(device)
        self.optimizer = torch.optim.Adam(self.net.parameters(), lr=1e-2)
        self.loss_fn = torch.nn.CrossEntropyLoss()
        self.correct, self.seen = 0, 0

    EVERY = 4  # one update every this many batches: enough for a curve, a quarter of the cost

    def step(self, z, idx) -> None:
        torch = torch_module()
        self.calls = getattr(self, "calls", 0) + 1
        if len(idx) < 2 or self.calls % self.EVERY:
            return
        target = self.codes[idx]
        logits = self.net(z.detach())
        loss = self.loss_fn(logits, target)
        self.optimizer.zero_grad(set_to_none=True)
        loss.backward()
        self.optimizer.step()
        with torch.no_grad():
            self.correct += int((logits.argmax(dim=1) == target).sum())
            self.seen += len(idx)

    def summary(self) -> dict[str, float]:
        row = {"probe_accuracy": self.correct / max(self.seen, 1), "probe_baseline": self.baseline}
        self.correct, self.seen = 0, 0
        return row


# ---------------------------------------------------------------- MMD
def mmd2_from_kernel(k, inside):
    """Unbiased MMD^2 between the rows ``inside`` (m) and the others (n) of a
    batch whose kernel matrix is ``k`` (Gretton et al., JMLR 2012, the unbiased
    estimator MMD^2_u, their eq. 3). Block sums are taken as products with the
    rows' indicator vectors, which avoids copying sub-matrices."""
    a = inside.to(k.dtype)
    b = 1.0 - a
    m, n = a.sum(), b.sum()
    diagonal = k.diagonal()
    ka, kb = k @ a, k @ b
    kxx = (a @ ka - (a * diagonal).sum()) / (m * (m - 1))
    kyy = (b @ kb - (b * diagonal).sum()) / (n * (n - 1))
    return kxx + kyy - 2 * (a @ kb) / (m * n)


MEDIAN_ROWS = 128  # rows of a batch used for the median heuristic (enough for a stable median, and cheap)


def gaussian_kernel(z, scales):
    """Sum of Gaussian kernels ``exp(-|a-b|^2 / (2 s^2))`` over the batch, with
    widths ``s`` = each scale times the median distance between distinct rows
    among the batch's first rows (the median heuristic, without gradient)."""
    torch = torch_module()
    squares = (z * z).sum(dim=1)
    # |a-b|^2 = |a|^2 + |b|^2 - 2 a.b: one matrix product, whose backward pass is
    # several times cheaper on the CPU than cdist's
    d2 = (squares[:, None] + squares[None, :] - 2.0 * (z @ z.T)).clamp_min(0.0)
    with torch.no_grad():
        r = min(len(z), MEDIAN_ROWS)
        upper = d2[:r, :r][torch.triu_indices(r, r, 1, device=z.device).unbind()]
        median = float(upper.median().sqrt()) if len(upper) else 1.0
    widths = [max(median, 1e-12) * s for s in scales]
    return sum(torch.exp(-d2 / (2 * w * w)) for w in widths)


def gaussian_kernel_mmd2(x, y, bandwidths):
    """Unbiased MMD^2 between samples ``x`` and ``y`` with a sum of Gaussian
    kernels of fixed ``bandwidths``."""
    torch = torch_module()
    xy = torch.cat([x, y])
    d2 = torch.cdist(xy, xy).pow(2)
    k = sum(torch.exp(-d2 / (2 * s * s)) for s in bandwidths)
    inside = torch.zeros(len(xy), dtype=torch.bool)
    inside[:len(x)] = True
    return mmd2_from_kernel(k, inside)


class MMDPenalty:
    def __init__(self, weight: float, bandwidth_scales: list[float], min_rows_per_group: int, warmup_epochs: int,
                 ramp_epochs: int, seed: int):
        self.weight, self.bandwidth_scales, self.min_rows_per_group = weight, list(bandwidth_scales), min_rows_per_group
        self.warmup_epochs, self.ramp_epochs, self.seed = warmup_epochs, ramp_epochs, seed

    def start(self, group, detector: NeuralDetector, device):
        return _MMDState(self, group, detector.embedding_dim, device)


class _MMDState:
    def __init__(self, spec: MMDPenalty, group, embedding_dim: int, device):
        torch = torch_module()
        values, codes = group_codes(group, "the distribution-matching detector", min_rows=spec.min_rows_per_group)
        self.spec = spec
        self.codes = torch.from_numpy(codes).to(device)
        self.probe = MonitorProbe(self.codes, len(values), embedding_dim, device, spec.seed)
        self.members = [torch.from_numpy(np.flatnonzero(codes == g)) for g in range(len(values))]
        self.epoch = 0
        self._sum, self._batches_seen = 0.0, 0

    def batches(self, n: int, batch_size: int, generator):
        """Batches that hold at least ``min_rows_per_group`` rows of every group:
        each group's rows are shuffled and dealt over the epoch's batches in
        proportion to its size, with a small group's rows dealt again (cycled)
        where its share would fall below the minimum."""
        torch = torch_module()
        n_batches = max(1, -(-n // batch_size))
        dealt = [[] for _ in range(n_batches)]
        for rows in self.members:
            per_batch = max(self.spec.min_rows_per_group, -(-len(rows) // n_batches))
            order = rows[torch.randperm(len(rows), generator=generator)]
            need = per_batch * n_batches
            cycled = order.repeat(-(-need // len(order)))[:need] if need > len(order) else order
            chunks = torch.tensor_split(cycled, n_batches)
            for batch, chunk in zip(dealt, chunks):
                batch.append(chunk)
        return [torch.cat(parts) for parts in dealt]

    def before_encoder_step(self, z, idx):
        return None

    def encoder_term(self, xb, zb, idx, epoch: int, detector):
        self.probe.step(zb, idx)
        codes = self.codes[idx]
        weight = _ramped(self.spec.weight, epoch, self.spec.warmup_epochs, self.spec.ramp_epochs)
        kernel = gaussian_kernel(zb, self.spec.bandwidth_scales)  # once per batch, shared by every group
        # each group against the rest of the batch: binary, multi-valued and intersectional alike
        # (with two groups, the second comparison is the first one again)
        groups = range(1) if len(self.members) == 2 else range(len(self.members))
        terms = [mmd2_from_kernel(kernel, codes == g) for g in groups
                 if int((codes == g).sum()) >= 2 and int((codes != g).sum()) >= 2]
        value = sum(terms) / max(len(terms), 1)
        self._sum += float(value.detach())
        self._batches_seen += 1
        return weight * value

    def after_encoder_step(self):
        return None

    def epoch_summary(self) -> dict[str, float]:
        row = {"mmd": self._sum / max(self._batches_seen, 1),
               "mmd_weight": _ramped(self.spec.weight, self.epoch, self.spec.warmup_epochs, self.spec.ramp_epochs),
               **self.probe.summary()}
        self._sum, self._batches_seen = 0.0, 0
        self.epoch += 1
        return row


# ---------------------------------------------------------------- wrappers
class FairTrainedDetector:
    """A neural base detector (built through the registry) trained with a penalty."""

    who = "fair training"

    def __init__(self, base: dict | None, weight: float, seed: int):
        if not weight >= 0:
            raise DetectorError(f"weight must be >= 0, got {weight}")
        self.base = dict(base or {"name": "deep_svdd"})
        self.weight = weight
        self.seed = seed

    def _base_detector(self) -> NeuralDetector:
        from evenflag.detectors.base import build_detector
        from evenflag.errors import ConfigError

        if not self.base.get("name") and not self.base.get("_target_"):
            raise DetectorError(f"{self.who}: base needs a name (deep_svdd, autoencoder or a registered neural detector)")
        try:
            base = build_detector(dict(self.base), seed=self.seed)
        except ConfigError as exc:
            raise DetectorError(f"{self.who} base: {exc}") from exc
        if not isinstance(base, NeuralDetector):
            raise DetectorError(f"{self.who}: base '{self.base.get('name') or self.base.get('_target_')}' is not a "
                                "neural detector (a NeuralDetector subclass); use deep_svdd or autoencoder")
        return base

    def check_settings(self) -> None:
        """Build the base (its own argument checks) without data."""
        self._base_detector()

    def _penalty(self):
        raise NotImplementedError

    def fit(self, X, group=None):
        self.base_ = self._base_detector()
        self.base_.fit(X, group, penalty=self._penalty())
        self.history_ = self.base_.history_
        return self

    def anomaly_score(self, X):
        return self.base_.anomaly_score(X)

    def embed(self, X):
        return self.base_.embed(X)


class AdversarialDetector(FairTrainedDetector):
    """A neural detector trained so that adversaries cannot tell the group from its embedding.

    Parameters
    ----------
    base : dict
        The neural base: ``{"name": "deep_svdd", ...settings}``, ``autoencoder``
        or any registered neural detector.
    weight : float
        Strength of the adversarial term.
    encoder_target : str
        ``confusion``: the encoder pushes the adversaries' predictions to the
        group prior (it wins only when they cannot tell); ``maximise``: it
        maximises their loss, which it can also "win" by making them
        confidently wrong, and that still leaks the group.
    n_adversaries : int
        Adversaries trained side by side; the encoder must fool all of them.
    reinit_every : int
        Re-initialise the adversaries every this many epochs (0: never), so the
        encoder cannot settle on fooling one particular adversary.
    adversary_hidden, adversary_steps, adversary_lr
        Each adversary's widths, updates per encoder update, learning rate.
    warmup_epochs, ramp_epochs : int
        Epochs before the term starts, then a linear ramp of the weight.
    mode : str
        ``alternating`` (adversaries frozen during the encoder step) or
        ``gradient_reversal`` (one backward pass through a reversal layer).
    """

    who = "the adversarial detector"

    def __init__(self, base: dict | None = None, weight: float = 1.0, adversary_hidden: list[int] | None = None,
                 adversary_steps: int = 5, warmup_epochs: int = 0, ramp_epochs: int = 0, mode: str = "alternating",
                 adversary_lr: float = 1e-2, encoder_target: str = "maximise", n_adversaries: int = 1,
                 reinit_every: int = 0, seed: int = 0):
        super().__init__(base, weight, seed)
        if mode not in MODES:
            raise DetectorError(f"mode '{mode}' is unknown; use one of {list(MODES)}")
        if encoder_target not in ENCODER_TARGETS:
            raise DetectorError(f"encoder_target '{encoder_target}' is unknown; use one of {list(ENCODER_TARGETS)}")
        for key, value in (("n_adversaries", n_adversaries), ("adversary_steps", adversary_steps)):
            if not isinstance(value, int) or value < 1:
                raise DetectorError(f"detector.{key} must be a whole number of at least 1, got {value!r}")
        if not isinstance(reinit_every, int) or reinit_every < 0:
            raise DetectorError(f"detector.reinit_every must be 0 (never) or a positive number of epochs, got {reinit_every!r}")
        self.adversary_hidden = list(adversary_hidden) if adversary_hidden is not None else [32]
        self.adversary_steps = adversary_steps
        self.warmup_epochs = warmup_epochs
        self.ramp_epochs = ramp_epochs
        self.mode = mode
        self.adversary_lr = adversary_lr
        self.encoder_target = encoder_target
        self.n_adversaries = n_adversaries
        self.reinit_every = reinit_every

    def _penalty(self):
        return AdversaryPenalty(self.weight, self.adversary_hidden, self.adversary_steps, self.adversary_lr,
                                self.warmup_epochs, self.ramp_epochs, self.mode, self.encoder_target,
                                self.n_adversaries, self.reinit_every, self.seed)


class DistributionMatchingDetector(FairTrainedDetector):
    """A neural detector whose loss adds ``weight`` times the maximum mean
    discrepancy between each group's embeddings and the rest of the batch.

    The kernel is a sum of Gaussians whose widths are ``bandwidth_scales``
    times the batch's median pairwise distance (the median heuristic); batches
    are dealt so that each holds at least ``min_rows_per_group`` rows of every
    group. With ``weight=0`` the base is trained exactly as alone.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> X = rng.normal(size=(300, 4)).astype("float32")
    >>> g = rng.choice(["a", "b"], 300)
    >>> det = DistributionMatchingDetector(base={"name": "autoencoder", "hidden": [8], "embedding_dim": 2,
    ...                                          "epochs": 2}, weight=1.0).fit(X, g)
    >>> sorted(det.history_[-1])
    ['detection_loss', 'mmd', 'mmd_weight', 'probe_accuracy', 'probe_baseline']
    """

    who = "the distribution-matching detector"

    def __init__(self, base: dict | None = None, weight: float = 3.0, bandwidth_scales: list[float] | None = None,
                 min_rows_per_group: int = 16, warmup_epochs: int = 0, ramp_epochs: int = 0, seed: int = 0):
        super().__init__(base, weight, seed)
        if not isinstance(min_rows_per_group, int) or min_rows_per_group < 2:
            raise DetectorError(f"detector.min_rows_per_group must be at least 2, got {min_rows_per_group!r}")
        self.bandwidth_scales = list(bandwidth_scales) if bandwidth_scales is not None else [0.5, 1.0, 2.0]
        if not self.bandwidth_scales or min(self.bandwidth_scales) <= 0:
            raise DetectorError(f"detector.bandwidth_scales must be positive numbers, got {self.bandwidth_scales}")
        self.min_rows_per_group = min_rows_per_group
        self.warmup_epochs = warmup_epochs
        self.ramp_epochs = ramp_epochs

    def _penalty(self):
        if self.weight == 0:
            return None  # exactly the base: same batches, same steps
        return MMDPenalty(self.weight, self.bandwidth_scales, self.min_rows_per_group, self.warmup_epochs,
                          self.ramp_epochs, self.seed)
