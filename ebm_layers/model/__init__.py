"""Stage 1, the model: unit layers, couplings, the EnergyModel that joins them, the colouring of its
graph, the pure tensor functions behind them, and the Statistics every phase returns."""
