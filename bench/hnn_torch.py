"""Reference trainer on PyTorch (CPU, eager mode): the Hamiltonian-network
loss of Visviva's energy model (MSE between the normalized J dH/dx and the
normalized target derivatives, per sample the mean over components, then the
batch mean), parameter gradients by autograd double backpropagation, global
norm clipping at 10, Adam with Visviva's warm-up + cosine schedule. Prints
nothing on success; writes a JSON summary (see common.write_summary)."""

import os
import time

os.environ.setdefault("CUDA_VISIBLE_DEVICES", "")  # CPU only, never a GPU

import numpy as np
import torch

import common


def build(sizes, init):
    layers = []
    for k, (w, b) in enumerate(init):
        lin = torch.nn.Linear(w.shape[1], w.shape[0])
        with torch.no_grad():
            lin.weight.copy_(torch.from_numpy(w))
            lin.bias.copy_(torch.from_numpy(b))
        layers.append(lin)
        if k + 1 < len(init):
            layers.append(torch.nn.Tanh())
    return torch.nn.Sequential(*layers)


def hnn_loss(model, zb, tb, gains, src, create_graph):
    zb = zb.detach().requires_grad_(True)
    energy = model(zb).sum()
    (u,) = torch.autograd.grad(energy, zb, create_graph=create_graph)
    pred = u[:, src] * gains
    return ((pred - tb) ** 2).mean()


def main():
    a = common.parse_args(__doc__.splitlines()[0])
    torch.set_num_threads(a.threads)
    x, dx = common.load_log(a.data)
    z_np, t_np, gains_np, src_np = common.normalize(x, dx)
    rows = z_np.shape[0]
    batch = min(a.batch, rows)
    sizes = [z_np.shape[1], *a.hidden, 1]
    model = build(sizes, common.initial_params(a, sizes))
    z = torch.from_numpy(z_np)
    t = torch.from_numpy(t_np)
    gains = torch.from_numpy(gains_np)
    src = torch.from_numpy(src_np)
    opt = torch.optim.Adam(
        model.parameters(),
        lr=a.lr,
        betas=(common.ADAM_BETA1, common.ADAM_BETA2),
        eps=common.ADAM_EPS,
        foreach=True,
    )
    orders = [torch.from_numpy(o) for o in common.epoch_orders(rows, batch, a.steps, a.seed)]
    params = list(model.parameters())

    start = time.perf_counter()
    for step in range(a.steps):
        idx = orders[step]
        loss = hnn_loss(model, z[idx], t[idx], gains, src, create_graph=True)
        opt.zero_grad(set_to_none=True)
        loss.backward()
        torch.nn.utils.clip_grad_norm_(params, common.CLIP_NORM)
        for g in opt.param_groups:
            g["lr"] = common.lr_at(step, a.lr, a.steps)
        opt.step()
    seconds = time.perf_counter() - start

    final = hnn_loss(model, z, t, gains, src, create_graph=False).item()
    common.write_summary(a.json, {
        "impl": "torch",
        "version": torch.__version__,
        "samples_per_second": a.steps * batch / seconds,
        "steps": a.steps,
        "batch": batch,
        "threads": a.threads,
        "torch_threads": torch.get_num_threads(),
        "seconds": seconds,
        "train_samples": rows,
        "final_train_loss": final,
        "last_loss": float(loss.item()),
    })


if __name__ == "__main__":
    main()
