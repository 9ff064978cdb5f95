"""Reference trainer on JAX (CPU): the same Hamiltonian-network loss as
Visviva's energy model and hnn_torch.py, gradients by nested jax.grad (double
backpropagation), global-norm clipping at 10 and Adam with Visviva's warm-up +
cosine schedule, the whole training step (batch gather, loss, gradient,
clipping, schedule, Adam) compiled by jax.jit ahead of the timed loop.
Writes a JSON summary (see common.write_summary)."""

import os
import sys
import time


def _threads_from_argv():
    for i, v in enumerate(sys.argv):
        if v == "--threads" and i + 1 < len(sys.argv):
            return int(sys.argv[i + 1])
        if v.startswith("--threads="):
            return int(v.split("=", 1)[1])
    return 1


# Thread count must be fixed before XLA starts: one thread means no Eigen
# intra-op pool; otherwise XLA sizes its pool from the CPUs this process may
# run on (cargo xtask bench restricts those with taskset).
os.environ["JAX_PLATFORMS"] = "cpu"
if _threads_from_argv() == 1:
    os.environ["XLA_FLAGS"] = (
        os.environ.get("XLA_FLAGS", "")
        + " --xla_cpu_multi_thread_eigen=false intra_op_parallelism_threads=1"
    )

import jax  # noqa: E402
import jax.numpy as jnp  # noqa: E402
import numpy as np  # noqa: E402

import common  # noqa: E402


def energy(params, z):
    h = z
    for w, b in params[:-1]:
        h = jnp.tanh(h @ w.T + b)
    w, b = params[-1]
    return (h @ w.T + b)[:, 0]


def hnn_loss(params, zb, tb, gains, src):
    u = jax.grad(lambda zz: energy(params, zz).sum())(zb)
    pred = u[:, src] * gains
    return jnp.mean((pred - tb) ** 2)


def make_step(batch, peak, total):
    warm = common.warmup_steps(total)
    span = max(total - warm, 1)
    b1, b2, eps = common.ADAM_BETA1, common.ADAM_BETA2, common.ADAM_EPS

    def lr_at(step):
        s = step.astype(jnp.float32)
        warm_lr = peak * (s + 1.0) / warm
        frac = jnp.minimum((s - warm) / span, 1.0)
        cos = 0.5 * (1.0 + jnp.cos(jnp.pi * frac))
        decay = peak * (common.LR_FLOOR + (1.0 - common.LR_FLOOR) * cos)
        return jnp.where(step < warm, warm_lr, decay)

    def step_fn(params, m, v, step, z, t, gains, src, perm, k):
        idx = jax.lax.dynamic_slice(perm, (k * batch,), (batch,))
        zb, tb = z[idx], t[idx]
        loss, grads = jax.value_and_grad(hnn_loss)(params, zb, tb, gains, src)
        leaves = jax.tree_util.tree_leaves(grads)
        norm = jnp.sqrt(sum(jnp.sum(g * g) for g in leaves))
        scale = jnp.where(norm > common.CLIP_NORM, common.CLIP_NORM / norm, 1.0)
        grads = jax.tree_util.tree_map(lambda g: g * scale, grads)
        lr = lr_at(step)
        n = (step + 1).astype(jnp.float32)
        c1 = 1.0 - b1 ** n
        c2 = 1.0 - b2 ** n
        m = jax.tree_util.tree_map(lambda mm, g: b1 * mm + (1 - b1) * g, m, grads)
        v = jax.tree_util.tree_map(lambda vv, g: b2 * vv + (1 - b2) * g * g, v, grads)
        params = jax.tree_util.tree_map(
            lambda p, mm, vv: p - lr * (mm / c1) / (jnp.sqrt(vv / c2) + eps), params, m, v
        )
        return params, m, v, step + 1, loss

    return step_fn


def main():
    a = common.parse_args(__doc__.splitlines()[0])
    x, dx = common.load_log(a.data)
    z_np, t_np, gains_np, src_np = common.normalize(x, dx)
    rows = z_np.shape[0]
    batch = min(a.batch, rows)
    sizes = [z_np.shape[1], *a.hidden, 1]
    params = [(jnp.asarray(w), jnp.asarray(b)) for w, b in common.initial_params(a, sizes)]
    m = jax.tree_util.tree_map(jnp.zeros_like, params)
    v = jax.tree_util.tree_map(jnp.zeros_like, params)
    step = jnp.asarray(0, dtype=jnp.int32)
    z, t = jnp.asarray(z_np), jnp.asarray(t_np)
    gains, src = jnp.asarray(gains_np), jnp.asarray(src_np.astype(np.int32))
    orders = common.epoch_orders(rows, batch, a.steps, a.seed)
    per_epoch = -(-rows // batch)
    # One permutation per epoch as a device array; step k of the epoch takes
    # rows k*batch .. (k+1)*batch (the epoch is padded to whole batches).
    perms = []
    for e in range(0, len(orders), per_epoch):
        flat = np.concatenate(orders[e:e + per_epoch]).astype(np.int32)
        perms.append(jnp.asarray(np.resize(flat, per_epoch * batch)))

    fn = jax.jit(make_step(batch, a.lr, a.steps), donate_argnums=(0, 1, 2))
    compiled = fn.lower(params, m, v, step, z, t, gains, src, perms[0],
                        jnp.asarray(0, dtype=jnp.int32)).compile()
    ks = [jnp.asarray(k, dtype=jnp.int32) for k in range(per_epoch)]
    jax.block_until_ready(ks)

    start = time.perf_counter()
    loss = None
    for s in range(a.steps):
        params, m, v, step, loss = compiled(params, m, v, step, z, t, gains, src,
                                            perms[s // per_epoch], ks[s % per_epoch])
    jax.block_until_ready((params, loss))
    seconds = time.perf_counter() - start

    final = float(jax.jit(hnn_loss)(params, z, t, gains, src))
    common.write_summary(a.json, {
        "impl": "jax",
        "version": jax.__version__,
        "samples_per_second": a.steps * batch / seconds,
        "steps": a.steps,
        "batch": batch,
        "threads": a.threads,
        "seconds": seconds,
        "train_samples": rows,
        "final_train_loss": final,
        "last_loss": float(loss),
    })


if __name__ == "__main__":
    main()
