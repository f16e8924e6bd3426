"""Torch networks and the training loop shared by the routers (private).

A network is a linear map or a ReLU MLP (``nn.Sequential``); its state travels as plain
float32 arrays. :func:`_train_loop` runs mini-batch Adam (Kingma & Ba, ICLR 2015) with
early stopping on a validation score and keeps the best epoch's weights; a linear map
under a convex loss may be fitted by full-batch L-BFGS instead (:func:`_fit_full_batch`).
"""

from __future__ import annotations

import contextlib
import math
import threading
import warnings
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
from torch import nn

#: Rows scored per chunk at prediction time (bounds peak memory).
_CHUNK = 1 << 16
#: Standardised features are clipped to +-_CLIP when scoring, so that extreme (finite)
#: inputs give large but finite scores instead of inf - inf = NaN.
_CLIP = 1e6
def _make_net(n_in: int, n_out: int, head: str, hidden: tuple[int, ...]) -> nn.Sequential:
    """A linear map or a ReLU MLP from n_in to n_out."""
    layers: list[nn.Module] = []
    width = n_in
    if head == "mlp":
        for h in hidden:
            layers += [nn.Linear(width, int(h)), nn.ReLU(inplace=True)]
            width = int(h)
    with warnings.catch_warnings():  # n_out = 0 (no experts) is legitimate
        warnings.filterwarnings("ignore", message="Initializing zero-element tensors")
        layers.append(nn.Linear(width, n_out))
    return nn.Sequential(*layers)


def _net_arrays(prefix: str, net: nn.Module) -> dict[str, np.ndarray]:
    """The state of a network as plain float32 arrays keyed ``prefix.name``."""
    return {f"{prefix}.{k}": v.detach().cpu().numpy().copy() for k, v in net.state_dict().items()}


def _load_net(net: nn.Module, prefix: str, arrays: Mapping[str, np.ndarray]) -> nn.Module:
    """Load plain arrays into a freshly built network (strict)."""
    state = {k: torch.from_numpy(np.array(arrays[f"{prefix}.{k}"], dtype=np.float32))
             for k in net.state_dict()}
    net.load_state_dict(state, strict=True)
    net.eval()
    return net


def _standardised(X: np.ndarray, mean: np.ndarray, scale: np.ndarray) -> np.ndarray:
    """``(X - mean) / scale`` clipped to +-_CLIP (an overflow to +-inf is clipped too)."""
    with np.errstate(over="ignore"):
        return np.clip((X - mean) / scale, -_CLIP, _CLIP)


def _forward(net: nn.Module, X: np.ndarray, mean: np.ndarray, scale: np.ndarray) -> np.ndarray:
    """Scores of raw rows X, standardised (clipped to +-_CLIP) chunk by chunk (float32)."""
    out_dim = net[-1].out_features
    out = np.empty((X.shape[0], out_dim), dtype=np.float32)
    net.eval()
    with torch.inference_mode():
        for s in range(0, X.shape[0], _CHUNK):
            xb = _standardised(X[s:s + _CHUNK], mean, scale)
            out[s:s + _CHUNK] = net(torch.from_numpy(np.ascontiguousarray(xb, np.float32))).numpy()
    return out


# ---- torch session and training loop ----------------------------------------------


def _fit_threads(n_in: int, n_out: int, head: str, hidden: tuple[int, ...],
                 batch_size: int) -> int:
    """CPU threads for training: 2 only when a batch is big enough to gain from them.

    Small networks run as fast on one thread, and two threads slow down badly when the
    machine is busy (measured here: up to 5x on a loaded 2-core machine).
    """
    widths = [n_in, *(hidden if head == "mlp" else ()), n_out]
    macs = batch_size * sum(a * b for a, b in zip(widths[:-1], widths[1:]))
    return 2 if macs >= 10_000_000 else 1


@contextlib.contextmanager
def _torch_session(rng: np.random.Generator, n_threads: int) -> Iterator[torch.Generator]:
    """Fork the torch RNG, seed it from rng, set threads (max 2); yield a shuffling Generator."""
    old_threads = torch.get_num_threads()
    torch.set_num_threads(max(1, min(2, n_threads, old_threads)))
    try:
        with torch.random.fork_rng(devices=[]):
            torch.manual_seed(int(rng.integers(0, 2**62)))
            gen = torch.Generator().manual_seed(int(rng.integers(0, 2**62)))
            yield gen
    finally:
        torch.set_num_threads(old_threads)


@dataclass
class _LoopSettings:
    """Optimiser and stopping settings of one training run."""

    max_epochs: int
    batch_size: int
    learning_rate: float
    weight_decay: float
    patience: int
    verbose: bool
    console: Any
    #: A rich Progress already running (two networks trained side by side share one);
    #: None: the loop opens its own.
    progress: Any = None
    #: Set when the network trained beside this one fails or is interrupted: the loop then
    #: stops after the epoch it is in (and ``fit`` raises the other side's error).
    cancel: threading.Event | None = None
    #: A linear network with a convex loss is fitted to convergence by full-batch L-BFGS
    #: (:func:`_fit_full_batch`) instead of epochs of Adam; the caller vouches for convexity.
    convex: bool = False


def _child_generator(gen: torch.Generator) -> torch.Generator:
    """A new torch Generator seeded from ``gen``: a second, independent batch order."""
    return torch.Generator().manual_seed(int(torch.randint(0, 2**62, (1,), generator=gen)))


def _progress(settings: _LoopSettings) -> Any:
    """A rich progress bar (disabled unless verbose)."""
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn

    return Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                    TextColumn("{task.fields[status]}"), console=settings.console,
                    disable=not settings.verbose, transient=True)


def _adam(net: nn.Module, settings: _LoopSettings) -> torch.optim.Optimizer:
    """Adam (Kingma & Ba, ICLR 2015); the fused CPU kernel where torch has it."""
    kw = {"lr": settings.learning_rate, "weight_decay": settings.weight_decay}
    try:
        return torch.optim.Adam(net.parameters(), fused=True, **kw)
    except (RuntimeError, TypeError, ValueError):  # older torch: no fused CPU Adam
        return torch.optim.Adam(net.parameters(), foreach=True, **kw)


def _effective_batch(n: int, batch_size: int) -> int:
    """Batch size, shrunk on small data so an epoch has about 20 steps (at least 32 rows)."""
    return int(min(batch_size, max(32, math.ceil(n / 20))))


def _is_linear(net: nn.Module) -> bool:
    """Whether ``net`` is one linear map (``head="linear"``)."""
    return isinstance(net, nn.Sequential) and len(net) == 1 and isinstance(net[0], nn.Linear)


#: L-BFGS iterations and tolerances of :func:`_fit_full_batch`.
_LBFGS_MAX_ITER = 200
_LBFGS_TOL_GRAD = 1e-6
_LBFGS_TOL_CHANGE = 1e-10


def _fit_full_batch(
    net: nn.Module,
    loss_fn: Callable[..., torch.Tensor],
    tensors: tuple[torch.Tensor, ...],
    val_score: Callable[[nn.Module], tuple[float, float]],
    settings: _LoopSettings,
    description: str,
) -> list[tuple[float, float]]:
    """Fit a linear network to convergence by full-batch L-BFGS; one validation score.

    Limited-memory BFGS (Liu & Nocedal, "On the limited memory BFGS method for large
    scale optimization", Mathematical Programming, 1989) with a strong Wolfe line
    search, the solver scikit-learn's ``LogisticRegression`` uses by default. For a
    convex loss of a linear map the optimum is unique (up to ties), so there are no
    epochs, batch orders or early stopping: the mean loss plus ``weight_decay / 2``
    times the squared weights (not the biases) is minimised, the penalty Adam's coupled
    weight decay stands for. Raises ``FloatingPointError`` if the fit is not finite.
    """
    weights = [p for name, p in net.named_parameters() if name.endswith("weight")]
    opt = torch.optim.LBFGS(net.parameters(), lr=1.0, max_iter=_LBFGS_MAX_ITER,
                            tolerance_grad=_LBFGS_TOL_GRAD, tolerance_change=_LBFGS_TOL_CHANGE,
                            history_size=10, line_search_fn="strong_wolfe")
    half_decay = 0.5 * settings.weight_decay

    def closure() -> torch.Tensor:
        opt.zero_grad(set_to_none=True)
        loss = loss_fn(net, *tensors)
        if half_decay > 0:
            loss = loss + half_decay * sum((w * w).sum() for w in weights)
        loss.backward()
        return loss

    shared = settings.progress
    with contextlib.nullcontext(shared) if shared is not None else _progress(settings) as progress:
        task = progress.add_task(description, total=1, status="L-BFGS")
        net.train()
        opt.step(closure)
        net.eval()
        with torch.no_grad():
            score = val_score(net)
        progress.update(task, advance=1, status=f"validation score {score[0]:.4f}")
    if not all(math.isfinite(v) for v in score) or not all(
            bool(torch.isfinite(p).all()) for p in net.parameters()):
        raise FloatingPointError(
            f"the full-batch fit of the {description} is not finite; check the features "
            "for extreme values")
    return [score]


def _train_loop(
    net: nn.Module,
    loss_fn: Callable[..., torch.Tensor],
    tensors: tuple[torch.Tensor, ...],
    val_score: Callable[[nn.Module], tuple[float, float]],
    settings: _LoopSettings,
    gen: torch.Generator,
    description: str,
) -> list[tuple[float, float]]:
    """Adam over shuffled mini-batches; keep the weights of the best validation score.

    ``val_score`` returns ``(primary, tie_break)``, both lower-is-better; training stops
    after ``patience`` epochs without improvement. An epoch whose score is not finite
    (a diverged network) is never kept; if no epoch gave a finite score the loop
    raises ``FloatingPointError``. Returns the per-epoch scores. With ``settings.convex``
    a linear network goes to :func:`_fit_full_batch` instead.
    """
    if settings.convex and _is_linear(net):
        return _fit_full_batch(net, loss_fn, tensors, val_score, settings, description)
    opt = _adam(net, settings)
    n = tensors[0].shape[0]
    batch_size = _effective_batch(n, settings.batch_size)
    history: list[tuple[float, float]] = []
    best, best_state, stale = (math.inf, math.inf), None, 0
    shared = settings.progress
    with contextlib.nullcontext(shared) if shared is not None else _progress(settings) as progress:
        task = progress.add_task(description, total=settings.max_epochs, status="")
        for _ in range(settings.max_epochs):
            net.train()
            perm = torch.randperm(n, generator=gen)
            # one gather per epoch (numpy's take is several times faster than torch
            # indexing on CPU), then contiguous slices
            shuffled = [torch.from_numpy(np.take(t.numpy(), perm.numpy(), axis=0))
                        for t in tensors]
            for s in range(0, n, batch_size):
                opt.zero_grad(set_to_none=True)
                loss = loss_fn(net, *(t[s:s + batch_size] for t in shuffled))
                loss.backward()
                opt.step()
            net.eval()
            with torch.no_grad():
                score = val_score(net)
            history.append(score)
            if all(math.isfinite(v) for v in score) and score < best:
                best, stale = score, 0
                best_state = {k: v.detach().clone() for k, v in net.state_dict().items()}
            else:
                stale += 1
            progress.update(task, advance=1, status=f"validation score {score[0]:.4f}")
            if stale >= settings.patience or (settings.cancel is not None
                                               and settings.cancel.is_set()):
                break
    if best_state is None and history:
        raise FloatingPointError(
            f"training of the {description} diverged: no epoch gave a finite validation "
            "score; try a smaller learning_rate or check the features for extreme values")
    if best_state is not None:
        net.load_state_dict(best_state)
    net.eval()
    return history
