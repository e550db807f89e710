"""Quickstart: build an RBM, train it in your own torch loop, sample from it (about 10 s).

python examples/quickstart.py      # writes out/quickstart_samples.png
"""

import torch

import ebm_layers as el

g = torch.Generator().manual_seed(0)
data, _ = el.datasets.parts_markings(2000, generator=g)  # (2000, 144) synthetic binary 12x12 scans
model = el.rbm(144, 100, generator=g)
model.init_visible_bias_from(data)
sampler = el.PersistentSampler(model, num_particles=100, generator=g)  # the fantasy particles
objective = el.TwoPhaseObjective(model, positive=el.MeanField(model), negative=sampler)
optimizer = torch.optim.Adam(model.parameters(), lr=0.003)
decay = torch.optim.lr_scheduler.LinearLR(optimizer, start_factor=1.0, end_factor=0.0, total_iters=30)
for epoch in range(30):
    for batch in data[torch.randperm(len(data), generator=g)].split(20):
        loss = objective(batch)  # a surrogate: its gradient is -(data statistics - model statistics)
        optimizer.zero_grad()
        loss.backward()
        optimizer.step()
    decay.step()  # towards zero: the samples then follow the model, not the last updates
    print(f"epoch {epoch + 1}: data - model statistics gap {objective.last.statistics_gap:.4f}")
samples = sampler.sample(100, burn_in=1000, progress=False)[0]  # visible layer, (100, 144)
print("saved", el.save_image_grid("out/quickstart_samples.png", samples, (12, 12)))
