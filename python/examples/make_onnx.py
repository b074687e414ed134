"""Train a tiny encoder and head in PyTorch and export them as encoder.onnx
and head.onnx in the current folder: the input onnx_example.py reads."""
import torch, torch.nn as nn, modelgate_export as mx


class Head(nn.Module):
    def __init__(self):
        super().__init__()
        self.net = nn.Sequential(nn.Linear(5, 8), nn.ReLU(), nn.Linear(8, 1), nn.Sigmoid())

    def forward(self, code, listener_tenure):
        return self.net(torch.cat([code, listener_tenure], 1))


shows, rows, y = mx.sample.network(seed=1)
x, t = (torch.tensor(a, dtype=torch.float32) for a in (mx.sample.matrix(rows), mx.sample.tenure(rows)))
torch.manual_seed(0)
encoder, head = nn.Sequential(nn.Linear(len(shows), 4), nn.Tanh()), Head()
opt = torch.optim.Adam([*encoder.parameters(), *head.parameters()], lr=0.01)
for _ in range(80):
    opt.zero_grad()
    nn.functional.binary_cross_entropy(head(encoder(x), t), torch.tensor(y[:, None] * 1.0, dtype=torch.float32)).backward()
    opt.step()
torch.onnx.export(encoder, (x[:2],), "encoder.onnx", input_names=["x"], output_names=["code"],
                  dynamic_axes={"x": {0: "batch"}, "code": {0: "batch"}})
torch.onnx.export(head, (torch.zeros(2, 4), t[:2]), "head.onnx", input_names=["code", "listener_tenure"],
                  output_names=["p"], dynamic_axes={"code": {0: "batch"}, "listener_tenure": {0: "batch"}, "p": {0: "batch"}})
