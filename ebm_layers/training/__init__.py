"""Stage 4, training: the objective (centering, sparsity, divergence guard), distributed helpers,
the epoch loop with checkpoints (fit) and greedy pretraining."""
