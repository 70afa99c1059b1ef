"""The forward model: a small latent-variable (CVAE) model of the other vehicles, its baselines and training."""
