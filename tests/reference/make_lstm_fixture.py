"""Makes lstm_fixture.json and lstm_fixture_wide.json: PyTorch nn.LSTM outputs and
gradients on fixed weights and inputs, the outside reference for mnemon's fused LSTM
(crates/nets/tests/torch_reference.rs). The wide one has enough hidden units (40) for the
fused op to split them over two and three threads.

Run: /work/peer-venv/bin/python tests/reference/make_lstm_fixture.py  (PyTorch, CPU, float64
math rounded to float32 inputs so the fixture is exact for f32 inputs.)
The loss is sum(out * w_out) + sum(c_T * w_c), so every output and the final cell state
carry a distinct gradient.
"""
import json, os

import torch

def make(seed, T, B, I, H, name):
    torch.manual_seed(seed)
    lstm = torch.nn.LSTM(I, H).double()  # gate order i, f, g, o; time-major [T, B, I]
    with torch.no_grad():
        for p in lstm.parameters():
            p.copy_(p.float().double())  # representable in f32
    x = torch.randn(T, B, I).float().double().requires_grad_()
    h0 = (0.5 * torch.randn(B, H)).float().double().requires_grad_()
    c0 = (0.5 * torch.randn(B, H)).float().double().requires_grad_()
    w_out = torch.randn(T, B, H).float().double()
    w_c = torch.randn(B, H).float().double()
    out, (hT, cT) = lstm(x, (h0[None], c0[None]))
    loss = (out * w_out).sum() + (cT[0] * w_c).sum()
    loss.backward()

    flat = lambda t: t.detach().reshape(-1).tolist()
    fixture = dict(
        source="PyTorch %s torch.nn.LSTM, float64" % torch.__version__,
        T=T, B=B, I=I, H=H,
        weight_ih=flat(lstm.weight_ih_l0), weight_hh=flat(lstm.weight_hh_l0),
        bias_ih=flat(lstm.bias_ih_l0), bias_hh=flat(lstm.bias_hh_l0),
        x=flat(x), h0=flat(h0), c0=flat(c0), w_out=flat(w_out), w_c=flat(w_c),
        out=flat(out), h_last=flat(hT), c_last=flat(cT), loss=loss.item(),
        grad_weight_ih=flat(lstm.weight_ih_l0.grad), grad_weight_hh=flat(lstm.weight_hh_l0.grad),
        grad_bias=flat(lstm.bias_ih_l0.grad),  # equal to bias_hh's gradient
        grad_x=flat(x.grad), grad_h0=flat(h0.grad), grad_c0=flat(c0.grad),
    )
    path = os.path.join(os.path.dirname(os.path.abspath(__file__)), name)
    with open(path, "w") as f:
        json.dump(fixture, f, indent=1)
    print("wrote", path)


make(20261202, 6, 3, 5, 4, "lstm_fixture.json")
make(20261204, 5, 4, 6, 40, "lstm_fixture_wide.json")
