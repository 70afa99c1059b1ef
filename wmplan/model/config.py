"""Configuration of the forward model and of its training: frozen dataclasses, one field per setting."""

from __future__ import annotations

from dataclasses import asdict, dataclass, fields

from wmplan.errors import ConfigError


@dataclass(frozen=True)
class ModelConfig:
    """Shape and size of the forward model."""

    history: int = 5
    """W: decision steps of history the model sees (the current one included)."""
    horizon: int = 15
    """H: decision steps predicted in one call (15 x 0.2 s = 3 s)."""
    num_objects: int = 8
    """M: other vehicles in the object list (the ego comes on top)."""
    plan_dt_s: float = 0.2
    """Length of one decision (model) step in seconds; two simulator steps by default."""
    d_model: int = 64
    """Width of the per-object embeddings."""
    num_heads: int = 4
    """Attention heads of the interaction block."""
    num_layers: int = 2
    """Self-attention layers over the object list (permutation-equivariant)."""
    hidden: int = 128
    """Width of the prior, posterior and decoder MLPs."""
    latent_dim: int = 4
    """Size of each vehicle's latent variable z (0 makes the deterministic baseline)."""
    deterministic: bool = False
    """Train by least squares without a latent variable (the baseline that averages the possible futures)."""

    def __post_init__(self) -> None:
        for f in fields(self):
            val = getattr(self, f.name)
            if isinstance(val, int) and not isinstance(val, bool) and val < (0 if f.name == "latent_dim" else 1):
                raise ConfigError(f"ModelConfig.{f.name} must be >= 1, got {val}")
        if self.d_model % self.num_heads:
            raise ConfigError(
                f"ModelConfig.d_model ({self.d_model}) must be a multiple of num_heads ({self.num_heads})"
            )
        if not self.deterministic and self.latent_dim < 1:
            raise ConfigError("ModelConfig.latent_dim must be >= 1 for the latent model (or set deterministic)")

    @property
    def num_rows(self) -> int:
        """Rows per window: the ego and ``num_objects`` others."""
        return 1 + self.num_objects

    def to_dict(self) -> dict:
        """The configuration as a JSON-ready dict."""
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict) -> ModelConfig:
        """The config from its JSON dict; unknown keys are a one-line error."""
        known = {f.name for f in fields(cls)}
        unknown = set(d) - known
        if unknown:
            raise ConfigError(f"ModelConfig: unknown field(s) {sorted(unknown)}")
        return cls(**d)


@dataclass(frozen=True)
class TrainConfig:
    """How the forward model is trained."""

    minutes: float = 4.5
    """Wall-clock cap; training stops after the epoch that crosses it (then the learning rate has not finished its
    decay: the run is reported as stopped early)."""
    max_epochs: int = 16
    """Epochs of ``steps_per_epoch`` steps; the learning-rate schedule runs over all of them, so the result depends
    on the seed and this number, not on the machine's speed. 16 take about 4 minutes on two idle cores (measured
    on onramp-merge)."""
    batch_size: int = 256
    lr: float | None = None
    """Peak learning rate of Adam; cosine decay to 10% of it over the ``max_epochs`` epochs. None: 4e-3 for the
    latent model, 2e-3 for the least-squares one (:meth:`peak_lr`), each the better of the two on onramp-merge
    (1024 episodes, 16 epochs; measured validation best-of-6 errors: latent 0.54 m at 4e-3 against 0.61 m at 2e-3,
    least squares 0.93 m at 2e-3 against 1.10 m at 4e-3)."""
    weight_decay: float = 0.0
    grad_clip: float = 1.0
    """Clip the global gradient norm (Pascanu et al. 2013)."""
    free_bits: float = 0.05
    """Free bits per latent dimension, in nats (Kingma et al. 2016, "Improved variational inference with inverse
    autoregressive flow")."""
    prior_weight: float = 0.0
    """Weight of the likelihood under a prior draw of z (hybrid objective of Sohn et al. 2015). 0 by default: on
    onramp-merge 0.1 and 0.5 blurred the modes (best-of-6 error up 70%) though they improved the NLL."""
    nll_beta: float = 0.5
    """beta of the beta-NLL loss (Seitzer et al., ICLR 2022): each term of the Gaussian NLL weighted by its
    predicted variance to the power beta (not differentiated), so that hard, high-variance futures still pull on the
    mean. 0 is the plain NLL. Measured on onramp-merge (16 epochs, learning rate 2e-3): validation best-of-6 error
    0.61 m with 0.5 against 0.81 m with 0 (the plain NLL's validation likelihood is better, -26.6 against -21.8
    nats; the predictive intervals are recalibrated after training either way)."""
    kl_warmup_epochs: int = 5
    """Linear KL annealing from 0 to 1 over these epochs (Bowman et al. 2016)."""
    val_fraction: float = 0.1
    """Share of episodes held out for validation (split by episode)."""
    anchor_stride: int = 1
    """Use every n-th decision step as an anchor."""
    steps_per_epoch: int = 200
    """Optimiser steps per epoch (an epoch here is a checkpoint interval, not a pass over the data)."""
    seed: int = 0
    threads: int = 2

    def __post_init__(self) -> None:
        if not self.minutes > 0:
            raise ConfigError(f"TrainConfig.minutes must be > 0, got {self.minutes}")
        if self.lr is not None and not self.lr > 0.0:
            raise ConfigError(f"TrainConfig.lr must be > 0 (or None for the default), got {self.lr}")
        if not 0.0 <= self.nll_beta <= 1.0:
            raise ConfigError(f"TrainConfig.nll_beta must lie in [0, 1], got {self.nll_beta}")
        if not 0.0 < self.val_fraction < 0.9:
            raise ConfigError(f"TrainConfig.val_fraction must lie in (0, 0.9), got {self.val_fraction}")
        for name in ("max_epochs", "batch_size", "anchor_stride", "steps_per_epoch", "threads"):
            if getattr(self, name) < 1:
                raise ConfigError(f"TrainConfig.{name} must be >= 1, got {getattr(self, name)}")

    def peak_lr(self, deterministic: bool) -> float:
        """The peak learning rate for the latent (``deterministic`` False) or the least-squares model."""
        if self.lr is not None:
            return self.lr
        return 2e-3 if deterministic else 4e-3

    def to_dict(self) -> dict:
        """The configuration as a JSON-ready dict."""
        return asdict(self)
