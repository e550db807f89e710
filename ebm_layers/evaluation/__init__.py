"""Stage 3, evaluation: partition functions (exact, annealed importance sampling, reverse AIS),
likelihoods and the report, chain diagnostics and mode occupancy. Uses the model and the phases."""
