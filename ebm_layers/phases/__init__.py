"""Stage 2, the phases: mean field, Gibbs sweeps and the samplers built on them (persistent,
replica exchange, fast weights, data particles) and exact enumeration. Each turns data or
particles into Statistics."""
