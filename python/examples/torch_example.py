import torch, torch.nn as nn, modelgate_export as mx
shows, rows, y = mx.sample.network(seed=1)                 # your listeners x shows, labels
x, t = (torch.tensor(a, dtype=torch.float32) for a in (mx.sample.matrix(rows), mx.sample.tenure(rows)))
torch.manual_seed(0)
encoder = nn.Sequential(nn.Linear(len(shows), 4), nn.Tanh())           # code = tanh(W x + b)
head = nn.Sequential(nn.Linear(5, 8), nn.ReLU(), nn.Linear(8, 1), nn.Sigmoid())
opt = torch.optim.Adam([*encoder.parameters(), *head.parameters()], lr=0.01)
for _ in range(80):
    opt.zero_grad(); nn.functional.binary_cross_entropy(head(torch.cat([encoder(x), t], 1)), torch.tensor(y[:, None] * 1.0, dtype=torch.float32)).backward(); opt.step()
enc = mx.torch.encoder(encoder, shows, "listener-encoder", transform="log1p")
enc.write("out/encoder", sample=rows)
mx.torch.scorer(head, enc, "promo-scorer", encoder_name="listener-encoder:v1",
                dense_inputs=["listener_tenure"]).write("out/scorer", sample=rows, labels=y)
