"""The train wing: data sets, models, the stacked-seed training loop, convergence and probes (torch)."""
