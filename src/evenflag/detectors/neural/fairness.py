"""Fairness-aware training of any neural detector.

A *penalty* adds a term to the detection loss of a :class:`NeuralDetector`
during ``fit``; a *wrapper* detector builds its base detector through the
detector registry (``base: {name: deep_svdd, ...}``, or any registered neural
plugin) and trains it with its penalty:

* :class:`AdversarialDetector` (``adversarial``): an adversary predicts the
  group from the embedding (by default the best linear one on the embedding
  and its squares, solved in closed form on every batch); the encoder is
  trained so that it cannot.
* :class:`DistributionMatchingDetector` (``distribution_matching``): the maximum
  mean discrepancy between the groups' embeddings (Gretton et al., JMLR 2012)
  is added to the loss, so the groups' embeddings are pulled to one
  distribution.

Every penalty works with binary, multi-valued and intersectional groups, logs
per-epoch curves (``train.*`` metrics) and refuses a group too small to train
on. ``weight=0`` trains the base exactly as it trains alone.
"""

from __future__ import annotations

import functools

import numpy as np

from evenflag.detectors.neural.training import NeuralDetector, group_codes, mlp, torch_module
from evenflag.errors import DetectorError

ENCODER_TARGETS = ("confusion", "maximise")
MODES = ("alternating", "gradient_reversal")
ADVERSARIES = ("closed_form", "network")
ADVERSARY_FEATURES = ("quadratic", "linear")


def _ramped(weight: float, epoch: int, warmup_epochs: int, ramp_epochs: int) -> float:
    """The penalty's weight at an epoch: 0 during warm-up, then a linear ramp."""
    if epoch < warmup_epochs:
        return 0.0
    if ramp_epochs:
        return weight * min(1.0, (epoch - warmup_epochs + 1) / ramp_epochs)
    return weight


# ---------------------------------------------------------------- batches
def balanced_batches(members, min_rows_per_group: int, n: int, batch_size: int, generator):
    """Batches that hold at least ``min_rows_per_group`` rows of every group
    (``members``: each group's row indices): each group's rows are shuffled and
    dealt over the epoch's batches in proportion to its size, with a small
    group's rows dealt again (cycled) where its share would fall below the minimum."""
    torch = torch_module()
    n_batches = max(1, -(-n // batch_size))
    dealt = [[] for _ in range(n_batches)]
    for rows in members:
        per_batch = max(min_rows_per_group, -(-len(rows) // n_batches))
        order = rows[torch.randperm(len(rows), generator=generator)]
        need = per_batch * n_batches
        cycled = order.repeat(-(-need // len(order)))[:need] if need > len(order) else order
        chunks = torch.tensor_split(cycled, n_batches)
        for batch, chunk in zip(dealt, chunks):
            batch.append(chunk)
    return [torch.cat(parts) for parts in dealt]


class _BatchedGroupsState:
    """What the closed-form adversary and distribution matching share: every
    group in every batch (:func:`balanced_batches`, so a group must have
    ``spec.min_rows_per_group`` training rows) and a monitoring probe whose
    accuracy is logged each epoch. ``who`` names the method in errors."""

    def __init__(self, spec, group, who: str, embedding_dim: int, device):
        torch = torch_module()
        values, codes = group_codes(group, who, min_rows=spec.min_rows_per_group)
        self.spec = spec
        self.n_groups = len(values)
        self.codes = torch.from_numpy(codes).to(device)
        self.probe = MonitorProbe(self.codes, len(values), embedding_dim, device, spec.seed)
        self.members = [torch.from_numpy(np.flatnonzero(codes == g)) for g in range(len(values))]
        self.epoch = 0

    def batches(self, n: int, batch_size: int, generator):
        return balanced_batches(self.members, self.spec.min_rows_per_group, n, batch_size, generator)

    def before_encoder_step(self, z, idx):
        return None

    def after_encoder_step(self):
        self.probe.update()


# ---------------------------------------------------------------- the trained adversary
def standardise(z, eps: float = 1e-5):
    """Each column of the batch to mean 0 and variance 1 (batch statistics, as
    batch normalisation without affine parameters computes them). Embeddings of
    a hypersphere model are tiny in scale; standardised, an adversary can learn
    from them at all. Differentiable, so the encoder sees the adversary through it."""
    mean = z.mean(dim=0)
    var = z.var(dim=0, unbiased=False)
    return (z - mean) * torch_module().rsqrt(var + eps)


def _adam(parameters, lr: float):
    """Adam for the small side networks (adversaries, probes): the fused kernel
    where this torch and device have it (the optimizer step is most of a small
    network's update on the CPU), else the multi-tensor one."""
    torch = torch_module()
    parameters = list(parameters)
    try:
        return torch.optim.Adam(parameters, lr=lr, fused=True)
    except (RuntimeError, TypeError, ValueError):
        return torch.optim.Adam(parameters, lr=lr, foreach=True)


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


REFIT_ROWS = 4096  # rows an adversary is refitted on each epoch: enough for a linear or small network


class AdversaryPenalty:
    """Adversaries that predict the group from the embedding (softmax over every
    group value), and the term the encoder adds to its loss."""

    def __init__(self, weight: float, hidden: list[int], steps: int, lr: float, warmup_epochs: int,
                 ramp_epochs: int, mode: str, encoder_target: str, n_adversaries: int, reinit_every: int, seed: int,
                 refit_steps: int = 0):
        self.weight, self.hidden, self.steps, self.lr = weight, list(hidden), steps, lr
        self.refit_steps = refit_steps
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
            self.nets = [mlp([self.embedding_dim, *self.spec.hidden, len(self.group_values_)], "relu", bias=True)
                         .to(self.device) for _ in range(self.spec.n_adversaries)]
        self.optimizers = [_adam(net.parameters(), self.spec.lr) for net in self.nets]

    def current_weight(self, epoch: int) -> float:
        return _ramped(self.spec.weight, epoch, self.spec.warmup_epochs, self.spec.ramp_epochs)

    def before_epoch(self, X, encode):
        """With ``refit_steps``: train every adversary for that many full-batch
        steps on the current embedding of (up to ``REFIT_ROWS`` of) the training
        rows, so that the encoder faces adversaries that have caught up with it,
        not ones that only saw the last batch. ``encode`` maps a tensor of rows
        to their embedding."""
        if not self.spec.refit_steps:
            return
        torch = torch_module()
        with torch.random.fork_rng(devices=[]):
            torch.manual_seed(self.spec.seed + 13 + 1000 * self.epoch)
            rows = torch.randperm(len(X))[:REFIT_ROWS] if len(X) > REFIT_ROWS else torch.arange(len(X))
        with torch.no_grad():
            z = standardise(encode(X[rows]))
        self._train(z, self.codes[rows], self.spec.refit_steps)

    def before_encoder_step(self, z, idx):
        """Train every adversary on the batch's detached embedding (alternating mode)."""
        if self.spec.mode != "alternating":
            return
        self._train(standardise(z), self.codes[idx], self.spec.steps)

    def _train(self, z, target, steps: int) -> None:
        """``steps`` updates of every adversary on the (detached, standardised) ``z``."""
        for net, optimizer in zip(self.nets, self.optimizers):
            for _ in range(steps):
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
            reversed_z = standardise(_gradient_reversal(zb, weight))
            logits_all = [net(reversed_z) for net in self.nets]
            for optimizer in self.optimizers:
                optimizer.zero_grad(set_to_none=True)  # filled by the encoder's backward pass
            loss = sum(self.loss_fn(logits, target) for logits in logits_all) / len(self.nets)
            term = loss
        else:
            for net in self.nets:
                for p in net.parameters():
                    p.requires_grad_(False)
            standard = standardise(zb)
            logits_all = [net(standard) for net in self.nets]
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
            self.net = torch.nn.Linear(embedding_dim, n_groups).to(device)
        self.optimizer = _adam(self.net.parameters(), 1e-2)
        self.loss_fn = torch.nn.CrossEntropyLoss()
        self.correct, self.seen = 0, 0
        self.calls, self._pending = 0, False

    EVERY = 4  # one update every this many batches: enough for a curve, a quarter of the cost

    def loss(self, z, idx):
        """The probe's loss on this batch (every ``EVERY``-th batch, else 0), to be
        added to the detector's objective: the embedding enters detached, so the
        one backward pass of the batch fills only the probe's gradients, and
        :meth:`update` then steps it (one backward pass instead of two)."""
        torch = torch_module()
        self.calls += 1
        self._pending = False
        if len(idx) < 2 or self.calls % self.EVERY:
            return 0.0
        target = self.codes[idx]
        logits = self.net(standardise(z.detach()))
        self.optimizer.zero_grad(set_to_none=True)
        self._pending = True
        with torch.no_grad():
            self.correct += int((logits.argmax(dim=1) == target).sum())
            self.seen += len(idx)
        return self.loss_fn(logits, target)

    def update(self) -> None:
        if self._pending:
            self.optimizer.step()
            self._pending = False

    def summary(self) -> dict[str, float]:
        row = {"probe_accuracy": self.correct / max(self.seen, 1), "probe_baseline": self.baseline}
        self.correct, self.seen = 0, 0
        return row


# ---------------------------------------------------------------- the closed-form adversary
def adversary_features(z, kind: str):
    """What the closed-form adversary sees of a batch's embedding: the
    embedding (``linear``), and also the square of each column's distance from
    the batch mean (``quadratic``). With squares, a group told apart by its
    spread, or by its distance from a hypersphere's centre (which is what the
    anomaly score is), differs in the features' means, where the adversary can
    see it; without them the encoder hides a mean shift by turning it into one
    (README, fair training). The batch mean and each column's scale enter as
    constants (no gradient): :func:`hotelling_lawley_trace` does not change
    under such a map of the features, and the scaling keeps its covariance
    well conditioned in float32 when a hypersphere model's embedding is tiny."""
    torch = torch_module()
    if kind == "quadratic":
        deviation = z - z.detach().mean(dim=0)
        z = torch.cat([z, deviation * deviation], dim=1)
    return z / (z.detach().std(dim=0) + 1e-12)


_HOTELLING_LAWLEY = None


def hotelling_lawley_trace(features, onehot, ridge: float = 1e-3):
    """``tr(E^-1 H)``, the Hotelling-Lawley trace of the groups on a batch's
    features (rows x features; ``onehot``: rows x groups, 0/1): ``H`` the
    between-group and ``E`` the within-group sums of squares and products. It
    is the trace criterion of Fisher's linear discriminant: the sum, over the
    discriminant directions, of the groups' spread against the spread within
    them, so it is how well the best linear classifier of the features,
    solved in closed form on this batch, tells the groups apart (with two
    groups, ``T^2 / (n - 2)`` for Hotelling's two-sample ``T^2``). It does not
    change under an invertible linear map of the features, so an encoder
    cannot lower it by shrinking or stretching its embedding. ``ridge`` times
    (rows - 1) is added to the diagonal of ``E`` so that it stays invertible
    (for features of unit variance, ``ridge`` times each one's sum of squares;
    0 gives the textbook value).

    The gradient is written out: with ``X`` the centred features, ``Y`` the
    group indicators, ``S = Y'X``, ``D`` the inverse group counts and
    ``Q = E^-1 S'``, dV/dX = 2 (Y D (Q' + S Q D Q') - X Q D Q'), centred over
    the rows: a few thin products instead of differentiating the p x p
    products. tests/test_neural.py checks the value against statsmodels'
    MANOVA and the gradient against torch's autograd."""
    global _HOTELLING_LAWLEY
    torch = torch_module()
    if _HOTELLING_LAWLEY is None:
        class HotellingLawleyTrace(torch.autograd.Function):
            @staticmethod
            def forward(ctx, features, onehot, ridge):
                n, p = features.shape
                centred = features - features.mean(dim=0)
                inverse_counts = 1.0 / onehot.sum(dim=0).clamp_min(1.0)
                sums = onehot.T @ centred  # S: n_g (m_g - m), a row per group
                within = torch.addmm(torch.eye(p, dtype=features.dtype, device=features.device), centred.T, centred,
                                     beta=ridge * max(n - 1, 1))
                within = within - (sums.T * inverse_counts) @ sums  # E = X'X - S'DS (+ ridge)
                solved = torch.linalg.solve(within, sums.T)  # Q: p x groups
                between = sums @ solved  # S Q
                ctx.save_for_backward(centred, onehot, solved, between, inverse_counts)
                return (between.diagonal() * inverse_counts).sum()

            @staticmethod
            def backward(ctx, grad):
                centred, onehot, solved, between, inverse_counts = ctx.saved_tensors
                weighted = solved * inverse_counts  # Q D
                right = solved.T + (between * inverse_counts) @ solved.T  # Q' + S Q D Q'
                grad_x = (2.0 * grad) * ((onehot * inverse_counts) @ right - (centred @ weighted) @ solved.T)
                return grad_x - grad_x.mean(dim=0), None, None

        _HOTELLING_LAWLEY = HotellingLawleyTrace
    return _HOTELLING_LAWLEY.apply(features, onehot, ridge)


class ClosedFormAdversaryPenalty:
    """The best linear adversary on each batch, in closed form: Fisher's
    discriminant of the groups on :func:`adversary_features` of the embedding.
    The encoder adds ``weight`` times how well it tells the groups apart
    (:func:`hotelling_lawley_trace`) to its loss. A trained adversary lags
    behind the encoder, and a fresh probe then still finds the group; this one
    is solved anew on every batch, so there is nothing to outrun."""

    def __init__(self, weight: float, features: str, min_rows_per_group: int, warmup_epochs: int, ramp_epochs: int,
                 seed: int):
        self.weight, self.features, self.min_rows_per_group = weight, features, min_rows_per_group
        self.warmup_epochs, self.ramp_epochs, self.seed = warmup_epochs, ramp_epochs, seed

    def start(self, group, detector: NeuralDetector, device):
        return _ClosedFormAdversaryState(self, group, detector.embedding_dim, device)


class _ClosedFormAdversaryState(_BatchedGroupsState):
    def __init__(self, spec: ClosedFormAdversaryPenalty, group, embedding_dim: int, device):
        super().__init__(spec, group, "the adversarial detector", embedding_dim, device)
        self.onehot = torch_module().nn.functional.one_hot(self.codes, self.n_groups).float()
        self._sum, self._batches_seen = 0.0, 0

    def encoder_term(self, xb, zb, idx, epoch: int, detector):
        weight = _ramped(self.spec.weight, epoch, self.spec.warmup_epochs, self.spec.ramp_epochs)
        separation = hotelling_lawley_trace(adversary_features(zb, self.spec.features), self.onehot[idx])
        self._sum += float(separation.detach())
        self._batches_seen += 1
        return self.probe.loss(zb, idx) + weight * separation

    def epoch_summary(self) -> dict[str, float]:
        row = {"adversary_trace": self._sum / max(self._batches_seen, 1),
               "adversary_weight": _ramped(self.spec.weight, self.epoch, self.spec.warmup_epochs,
                                           self.spec.ramp_epochs)}
        row.update(self.probe.summary())
        self._sum, self._batches_seen = 0.0, 0
        self.epoch += 1
        return row


# ---------------------------------------------------------------- MMD
MEDIAN_ROWS = 128  # rows of a batch used for the median heuristic (enough for a stable median, and cheap)


def _squared_distances(z):
    # |a-b|^2 = |a|^2 + |b|^2 - 2 a.b: one matrix product, several times cheaper
    # on the CPU than cdist
    squares = (z * z).sum(dim=1)
    d2 = torch_module().addmm(squares[None, :], z, z.T, alpha=-2.0)
    return d2.add_(squares[:, None]).clamp_min_(0.0)


def _squarings(wide: float, narrow: float) -> int | None:
    """How many squarings turn the kernel of width ``wide`` into that of
    ``narrow`` (its exponent (wide/narrow)^2 = 2^k times larger), or None."""
    ratio = (wide / narrow) ** 2
    power = round(ratio)
    if power >= 2 and abs(ratio - power) < 1e-9 and power & (power - 1) == 0:
        return power.bit_length() - 1
    return None


def _gaussians(d2, widths):
    """``exp(-d2 / (2 w^2))`` for each width; ``d2`` is overwritten. Where a
    narrower width's exponent is 4, 16, ... times a wider one's, the kernel is
    the wider kernel squared repeatedly: a multiplication is about a tenth of an
    ``exp`` on the CPU, and the default widths (0.5, 1, 2 x the median) are
    such a ladder."""
    ordered = sorted(set(widths), reverse=True)
    steps = [None] + [_squarings(a, b) for a, b in zip(ordered, ordered[1:])]
    last_exp = max(i for i, k in enumerate(steps) if k is None)
    out, previous = {}, None
    for i, (w, k) in enumerate(zip(ordered, steps)):
        if k is None:
            source = d2 if i == last_exp else d2.clone()  # the last exp may overwrite the distances
            kernel = source.mul_(-0.5 / (w * w)).exp_()
        else:
            kernel = previous
            for _ in range(k):
                kernel = kernel * kernel
        out[w] = previous = kernel
    return [out[w] for w in widths]


@functools.lru_cache(maxsize=8)
def _upper_triangle(r: int, device: str):
    return torch_module().triu_indices(r, r, 1, device=device).unbind()


def median_widths(d2, scales) -> list[float]:
    """Kernel widths: each scale times the median distance between distinct rows
    among the batch's first rows (the median heuristic; no gradient)."""
    torch = torch_module()
    with torch.no_grad():
        r = min(len(d2), MEDIAN_ROWS)
        upper = d2[:r, :r][_upper_triangle(r, str(d2.device))]
        median = float(upper.median().sqrt()) if len(upper) else 1.0
    return [max(median, 1e-12) * s for s in scales]


def gaussian_kernel_mmd2(x, y, bandwidths):
    """Unbiased MMD^2 (Gretton et al., JMLR 2012, eq. 3) between samples ``x``
    and ``y`` with a sum of Gaussian kernels of fixed ``bandwidths``: the
    training penalty's own computation, with ``x`` as the group."""
    torch = torch_module()
    codes = torch.cat([torch.zeros(len(x), dtype=torch.long), torch.ones(len(y), dtype=torch.long)])
    return kernel_mmd2(torch.cat([x, y]), contrast_weights(codes, [0], x.dtype), bandwidths, median=1.0)


def contrast_weights(codes, groups, dtype=None, counts: list[int] | None = None):
    """The matrix ``C`` with ``sum_ij C_ij k_ij`` = the mean over ``groups`` of
    MMD^2_u(group g, rest of the batch) for any kernel matrix ``k``: 1/(m(m-1))
    inside the group, 1/(n(n-1)) inside the rest, -1/(mn) across, 0 on the
    diagonal (eq. 3 of Gretton et al. written as one weighted sum).

    Built as ``V M V^T``: ``V`` holds each row's indicators (in group g, not in
    g), ``M`` the three coefficients of each group (a small matrix made in
    numpy): one matrix product over the batch, few tensor operations.
    ``counts`` (rows per group code) saves counting again when the caller has them."""
    torch = torch_module()
    groups = list(groups)
    k = len(groups)
    counts = counts if counts is not None else torch.bincount(codes).tolist()
    coefficients = np.zeros((2 * k, 2 * k))
    for j, g in enumerate(groups):
        m = counts[g] if g < len(counts) else 0
        n = len(codes) - m
        coefficients[j, j] = 1.0 / (m * (m - 1))
        coefficients[k + j, k + j] = 1.0 / (n * (n - 1))
        coefficients[j, k + j] = coefficients[k + j, j] = -1.0 / (m * n)
    inside = codes[:, None] == torch.as_tensor(groups, device=codes.device)[None, :]
    v = torch.cat([inside, ~inside], dim=1).to(dtype or torch.float32)
    m_tensor = torch.from_numpy(coefficients / k).to(v.dtype).to(v.device)
    return ((v @ m_tensor) @ v.T).fill_diagonal_(0.0)


_KERNEL_MMD = None


def kernel_mmd2(z, weights, scales, median: float | None = None):
    """``sum_ij weights_ij sum_s exp(-|z_i - z_j|^2 / (2 w_s^2))`` with widths
    ``w_s = scale_s x median`` (by default the median heuristic,
    :func:`median_widths`), with the gradient in ``z`` written out: the
    256 x 256 kernel leaves no autograd graph, one pass builds the value and
    dL/d(d2), and one matrix product gives dL/dz. With ``weights`` from
    :func:`contrast_weights` it is the unbiased MMD^2; tests/test_neural.py
    checks value and gradient against the published estimator and autograd."""
    global _KERNEL_MMD
    torch = torch_module()
    if _KERNEL_MMD is None:
        class KernelMMD(torch.autograd.Function):
            @staticmethod
            def forward(ctx, z, weights, scales, median):
                d2 = _squared_distances(z)
                widths = median_widths(d2, scales) if median is None else [median * s for s in scales]
                flat_weights = weights.reshape(-1)
                value = z.new_zeros(())
                slope = torch.zeros_like(d2)  # dL/d(d2_ij)
                for w, kernel in zip(widths, _gaussians(d2, widths)):
                    value = value + torch.dot(flat_weights, kernel.reshape(-1))
                    slope.add_(kernel, alpha=-0.5 / (w * w))
                slope.mul_(weights)
                ctx.save_for_backward(z, slope)
                return value

            @staticmethod
            def backward(ctx, grad):
                z, slope = ctx.saved_tensors
                # d2_ij = |z_i - z_j|^2 and slope is symmetric:
                # dL/dz_i = 4 sum_j slope_ij (z_i - z_j)
                grad_z = 4.0 * grad * (slope.sum(dim=1, keepdim=True) * z - slope @ z)
                return grad_z, None, None, None

        _KERNEL_MMD = KernelMMD
    return _KERNEL_MMD.apply(z, weights, tuple(scales), median)


# ---------------------------------------------------------------- score distributions
def wasserstein1(a, b):
    """Wasserstein-1 distance between the empirical distributions of the 1-d
    tensors ``a`` and ``b`` (any sizes), differentiable in both: the integral
    over u in (0, 1) of |F_a^-1(u) - F_b^-1(u)|, exact for step quantile
    functions, taken over the merged breakpoints i/m and j/n (the sorted-quantile
    form; equal to scipy.stats.wasserstein_distance, tests/test_neural.py)."""
    torch = torch_module()
    a_sorted, b_sorted = torch.sort(a).values, torch.sort(b).values
    m, n = len(a), len(b)
    dtype = a_sorted.dtype
    cuts = torch.sort(torch.cat([torch.arange(1, m + 1, dtype=dtype, device=a.device) / m,
                                 torch.arange(1, n + 1, dtype=dtype, device=a.device) / n])).values
    lengths = torch.diff(cuts, prepend=cuts.new_zeros(1))
    middle = cuts - lengths / 2  # strictly inside each interval of positive length
    ia = torch.clamp((middle * m).long(), max=m - 1)
    ib = torch.clamp((middle * n).long(), max=n - 1)
    return (lengths * (a_sorted[ia] - b_sorted[ib]).abs()).sum()


def score_distance_term(scores, codes, groups):
    """Mean over ``groups`` of W1(scores of the group, scores of the rest of the
    batch), divided by the batch's score standard deviation so the encoder
    cannot lower it by shrinking every score alike."""
    torch = torch_module()
    terms = [wasserstein1(scores[codes == g], scores[codes != g]) for g in groups]
    return torch.stack(terms).mean() / (scores.std() + 1e-12)


class MMDPenalty:
    def __init__(self, weight: float, bandwidth_scales: list[float], min_rows_per_group: int, warmup_epochs: int,
                 ramp_epochs: int, seed: int, score_weight: float = 0.0):
        self.weight, self.bandwidth_scales, self.min_rows_per_group = weight, list(bandwidth_scales), min_rows_per_group
        self.warmup_epochs, self.ramp_epochs, self.seed = warmup_epochs, ramp_epochs, seed
        self.score_weight = score_weight

    def start(self, group, detector: NeuralDetector, device):
        return _MMDState(self, group, detector.embedding_dim, device)


class _MMDState(_BatchedGroupsState):
    def __init__(self, spec: MMDPenalty, group, embedding_dim: int, device):
        super().__init__(spec, group, "the distribution-matching detector", embedding_dim, device)
        self._sum, self._score_sum, self._batches_seen = 0.0, 0.0, 0
        self._weights = {}  # the batch's group layout -> its contrast weights

    def encoder_term(self, xb, zb, idx, epoch: int, detector):
        probe_loss = self.probe.loss(zb, idx)
        codes = self.codes[idx]
        weight = _ramped(self.spec.weight, epoch, self.spec.warmup_epochs, self.spec.ramp_epochs)
        # each group against the rest of the batch: binary, multi-valued and intersectional alike
        # (with two groups, the second comparison is the first one again)
        counts = torch_module().bincount(codes, minlength=len(self.members)).tolist()
        groups = [g for g in (range(1) if len(self.members) == 2 else range(len(self.members)))
                  if counts[g] >= 2 and len(idx) - counts[g] >= 2]
        term = probe_loss
        self._batches_seen += 1
        if groups and self.spec.weight > 0:
            value = kernel_mmd2(zb, self._contrast_weights(codes, groups, counts), self.spec.bandwidth_scales)
            self._sum += float(value.detach())
            term = term + weight * value
        if groups and self.spec.score_weight > 0:
            distance = score_distance_term(detector.row_scores(xb, zb), codes, groups)
            self._score_sum += float(distance.detach())
            term = term + self._ramped_score_weight(epoch) * distance
        return term

    def _contrast_weights(self, codes, groups: list[int], counts: list[int]):
        """``contrast_weights`` of this batch's layout, made once per layout:
        the sampler deals each group's rows in one block, so an epoch's batches
        share a few layouts, and building the matrix (about 0.14 ms) was a
        tenth of the penalty's cost per batch."""
        key = (codes.cpu().numpy().tobytes(), tuple(groups))
        weights = self._weights.get(key)
        if weights is None:
            if len(self._weights) >= 64:  # layouts that do not repeat: keep the memory bounded
                self._weights.clear()
            weights = self._weights[key] = contrast_weights(codes, groups, counts=counts)
        return weights

    def _ramped_score_weight(self, epoch: int) -> float:
        return _ramped(self.spec.score_weight, epoch, self.spec.warmup_epochs, self.spec.ramp_epochs)

    def epoch_summary(self) -> dict[str, float]:
        seen = max(self._batches_seen, 1)
        row = {}
        if self.spec.weight > 0:
            row["mmd"] = self._sum / seen
            row["mmd_weight"] = _ramped(self.spec.weight, self.epoch, self.spec.warmup_epochs, self.spec.ramp_epochs)
        if self.spec.score_weight > 0:
            row["score_w1"] = self._score_sum / seen
            row["score_weight"] = self._ramped_score_weight(self.epoch)
        row.update(self.probe.summary())
        self._sum, self._score_sum, self._batches_seen = 0.0, 0.0, 0
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
    """A neural detector trained so that an adversary cannot tell the group from its embedding.

    Two adversaries:

    * ``adversary="closed_form"`` (default): the best linear classifier of the
      group on the batch's embedding and its squares, solved in closed form on
      every batch; the encoder adds ``weight`` times how well it separates the
      groups (:func:`hotelling_lawley_trace`) to its loss. Batches are dealt
      so that each holds ``min_rows_per_group`` rows of every group.
    * ``adversary="network"``: small networks trained by gradient steps to
      predict the group (softmax over every group value), side by side with
      the encoder. Measured from outside, the encoder outruns them and a fresh
      probe still finds the group (README, fair training); kept for
      comparison. Its settings are ``adversary_hidden``, ``adversary_steps``,
      ``adversary_lr``, ``mode``, ``encoder_target``, ``n_adversaries``,
      ``reinit_every`` and ``refit_steps``.

    Their weights are on different scales: 0.03 (the default) for
    ``closed_form``, 1 to 3 for ``network``.

    Parameters
    ----------
    base : dict
        The neural base: ``{"name": "deep_svdd", ...settings}``, ``autoencoder``
        or any registered neural detector.
    weight : float
        Strength of the adversarial term (0: the base exactly).
    adversary : str
        ``closed_form`` or ``network`` (above).
    adversary_features : str
        What the ``closed_form`` adversary sees: ``quadratic`` (the embedding
        and its squares) or ``linear`` (the embedding only; the
        encoder then moves the group into the embedding's spread).
    min_rows_per_group : int
        Rows of every group in each batch (``closed_form``; at least 2).
    warmup_epochs, ramp_epochs : int
        Epochs before the term starts, then a linear ramp of the weight.
    encoder_target : str
        (``network``) ``confusion``: the encoder pushes the adversaries'
        predictions to the group prior; ``maximise``: it maximises their loss,
        which it can also "win" by making them confidently wrong.
    n_adversaries : int
        (``network``) Adversaries trained side by side; the encoder must fool all.
    reinit_every : int
        (``network``) Re-initialise the adversaries every this many epochs (0: never).
    refit_steps : int
        (``network``) Before each epoch, train the adversaries this many
        full-batch steps on the current embedding of the training rows (0: never).
    adversary_hidden, adversary_steps, adversary_lr
        (``network``) Each adversary's widths, updates per encoder update, learning rate.
    mode : str
        (``network``) ``alternating`` (adversaries frozen during the encoder
        step) or ``gradient_reversal`` (one backward pass through a reversal layer).

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> X = rng.normal(size=(300, 4)).astype("float32")
    >>> g = rng.choice(["a", "b"], 300)
    >>> det = AdversarialDetector(base={"name": "deep_svdd", "hidden": [8], "embedding_dim": 3, "epochs": 2}).fit(X, g)
    >>> sorted(det.history_[-1])
    ['adversary_trace', 'adversary_weight', 'detection_loss', 'probe_accuracy', 'probe_baseline']
    """

    who = "the adversarial detector"

    def __init__(self, base: dict | None = None, weight: float = 0.03, adversary: str = "closed_form",
                 adversary_features: str = "quadratic", min_rows_per_group: int = 16, warmup_epochs: int = 0,
                 ramp_epochs: int = 0, adversary_hidden: list[int] | None = None, adversary_steps: int = 5,
                 adversary_lr: float = 1e-2, mode: str = "alternating", encoder_target: str = "maximise",
                 n_adversaries: int = 1, reinit_every: int = 0, refit_steps: int = 0, seed: int = 0):
        super().__init__(base, weight, seed)
        if adversary not in ADVERSARIES:
            raise DetectorError(f"detector.adversary '{adversary}' is unknown; use one of {list(ADVERSARIES)}")
        if adversary_features not in ADVERSARY_FEATURES:
            raise DetectorError(f"detector.adversary_features '{adversary_features}' is unknown; use one of "
                                f"{list(ADVERSARY_FEATURES)}")
        if not isinstance(min_rows_per_group, int) or min_rows_per_group < 2:
            raise DetectorError(f"detector.min_rows_per_group must be at least 2, got {min_rows_per_group!r}")
        if mode not in MODES:
            raise DetectorError(f"mode '{mode}' is unknown; use one of {list(MODES)}")
        if encoder_target not in ENCODER_TARGETS:
            raise DetectorError(f"encoder_target '{encoder_target}' is unknown; use one of {list(ENCODER_TARGETS)}")
        for key, value in (("n_adversaries", n_adversaries), ("adversary_steps", adversary_steps)):
            if not isinstance(value, int) or value < 1:
                raise DetectorError(f"detector.{key} must be a whole number of at least 1, got {value!r}")
        if not isinstance(reinit_every, int) or reinit_every < 0:
            raise DetectorError(f"detector.reinit_every must be 0 (never) or a positive number of epochs, got {reinit_every!r}")
        if not isinstance(refit_steps, int) or refit_steps < 0:
            raise DetectorError(f"detector.refit_steps must be 0 (never) or a positive number of steps, "
                                f"got {refit_steps!r}")
        self.adversary = adversary
        self.adversary_features = adversary_features
        self.min_rows_per_group = min_rows_per_group
        self.warmup_epochs = warmup_epochs
        self.ramp_epochs = ramp_epochs
        self.adversary_hidden = list(adversary_hidden) if adversary_hidden is not None else [32]
        self.adversary_steps = adversary_steps
        self.adversary_lr = adversary_lr
        self.mode = mode
        self.encoder_target = encoder_target
        self.n_adversaries = n_adversaries
        self.reinit_every = reinit_every
        self.refit_steps = refit_steps

    def _penalty(self):
        if self.adversary == "closed_form":
            if self.weight == 0:
                return None  # exactly the base: same batches, same steps
            return ClosedFormAdversaryPenalty(self.weight, self.adversary_features, self.min_rows_per_group,
                                              self.warmup_epochs, self.ramp_epochs, self.seed)
        return AdversaryPenalty(self.weight, self.adversary_hidden, self.adversary_steps, self.adversary_lr,
                                self.warmup_epochs, self.ramp_epochs, self.mode, self.encoder_target,
                                self.n_adversaries, self.reinit_every, self.seed, self.refit_steps)


class DistributionMatchingDetector(FairTrainedDetector):
    """A neural detector whose loss adds ``weight`` times the maximum mean
    discrepancy between each group's embeddings and the rest of the batch,
    and optionally ``score_weight`` times the Wasserstein-1 distance between
    the group's anomaly scores and the rest's.

    The kernel is a sum of Gaussians whose widths are ``bandwidth_scales``
    times the batch's median pairwise distance (the median heuristic); batches
    are dealt so that each holds at least ``min_rows_per_group`` rows of every
    group. The score term (:func:`score_distance_term`) is divided by the
    batch's score spread, so it is about the shape of the groups' score
    distributions, the thing ``score_distance`` measures, not their scale.
    With ``weight=0`` and ``score_weight=0`` the base is trained exactly as alone.

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
                 min_rows_per_group: int = 16, warmup_epochs: int = 0, ramp_epochs: int = 0,
                 score_weight: float = 0.0, seed: int = 0):
        super().__init__(base, weight, seed)
        if not score_weight >= 0:
            raise DetectorError(f"detector.score_weight must be >= 0, got {score_weight!r}")
        self.score_weight = score_weight
        if not isinstance(min_rows_per_group, int) or min_rows_per_group < 2:
            raise DetectorError(f"detector.min_rows_per_group must be at least 2, got {min_rows_per_group!r}")
        self.bandwidth_scales = list(bandwidth_scales) if bandwidth_scales is not None else [0.5, 1.0, 2.0]
        if not self.bandwidth_scales or min(self.bandwidth_scales) <= 0:
            raise DetectorError(f"detector.bandwidth_scales must be positive numbers, got {self.bandwidth_scales}")
        self.min_rows_per_group = min_rows_per_group
        self.warmup_epochs = warmup_epochs
        self.ramp_epochs = ramp_epochs

    def _penalty(self):
        if self.weight == 0 and self.score_weight == 0:
            return None  # exactly the base: same batches, same steps
        return MMDPenalty(self.weight, self.bandwidth_scales, self.min_rows_per_group, self.warmup_epochs,
                          self.ramp_epochs, self.seed, self.score_weight)
