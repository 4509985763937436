"""Statistics: copulas, ranks, fitting, inference, rolling metrics, marginal filtering, signals. No store, config or plotting."""
