"""Shared parts of the reference trainers: command line, CSV loading, the
normalization and loss weights of Visviva's energy-model loss (mirrored from
trainer/src/hnn.rs), Glorot-uniform initialization, the learning-rate
schedule (linear warm-up, then cosine decay to a floor; trainer/src/optim.rs)
and the JSON summary. Framework-independent: NumPy only."""

import argparse
import csv
import json
import math
import os
import tempfile

import numpy as np

# Settings Visviva's trainer uses by default (trainer/src/fit.rs FitSettings).
WARMUP_FRACTION = 0.02
LR_FLOOR = 0.01
CLIP_NORM = 10.0
ADAM_BETA1 = 0.9
ADAM_BETA2 = 0.999
ADAM_EPS = 1e-8


def parse_args(description):
    ap = argparse.ArgumentParser(description=description)
    ap.add_argument("--data", required=True, help="motion log CSV (traj,t,q1,p1,dq1,dp1)")
    ap.add_argument("--hidden", default="64,64", help="hidden widths, comma separated")
    ap.add_argument("--batch", type=int, default=256)
    ap.add_argument("--steps", type=int, default=2000)
    ap.add_argument("--lr", type=float, default=1e-3)
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--json", required=True, help="summary output (JSON)")
    ap.add_argument("--init", help="initial parameters (Visviva's, written by cargo xtask bench)")
    a = ap.parse_args()
    a.hidden = [int(w) for w in a.hidden.split(",") if w]
    return a


def load_log(path):
    """States x = (q1, p1) and derivatives dx = (dq1, dp1) as float64 rows,
    in file order (one degree of freedom, derivative columns required)."""
    with open(path, newline="") as f:
        reader = csv.reader(f)
        header = next(reader)
        cols = {name.strip(): i for i, name in enumerate(header)}
        need = ["q1", "p1", "dq1", "dp1"]
        missing = [c for c in need if c not in cols]
        if missing:
            raise SystemExit(f"{path}: line 1: missing column(s) {', '.join(missing)}")
        rows = []
        for line, rec in enumerate(reader, start=2):
            try:
                rows.append([float(rec[cols[c]]) for c in need])
            except (ValueError, IndexError) as e:
                raise SystemExit(f"{path}: line {line}: bad number ({e})")
    a = np.asarray(rows, dtype=np.float64)
    return a[:, :2], a[:, 2:]


def normalize(x, dx):
    """Visviva's normalization for a general energy model (hnn.rs,
    Normalization::from_data with momenta_at_zero = false, then normalize and
    gains): z = (x - mean) / std, targets dx / rms(dx), and the gains that
    turn dE/dz into normalized J dH/dx. Returns float32 z, t, gains and the
    source column of dE/dz for each predicted component."""
    n = x.shape[1] // 2
    count = x.shape[0]
    mean = x.sum(axis=0) / count
    var = np.maximum((x * x).sum(axis=0) / count - mean * mean, 0.0)
    std = np.sqrt(var)
    offset = mean.astype(np.float32)
    scale = np.where(std > 0, std, 1.0).astype(np.float32)
    rms = np.sqrt((dx * dx).sum(axis=0) / count)
    rate_scale = np.where(rms > 0, rms, 1.0).astype(np.float32)
    log_sum = 0.0
    for i in range(n):
        log_sum += math.log(float(rate_scale[i]) * float(scale[n + i]))
        log_sum += math.log(float(rate_scale[n + i]) * float(scale[i]))
    es = np.float32(math.exp(log_sum / (2 * n)))
    z = ((x - offset.astype(np.float64)) / scale.astype(np.float64)).astype(np.float32)
    t = (dx / rate_scale.astype(np.float64)).astype(np.float32)
    gains = np.zeros(2 * n, dtype=np.float32)
    for i in range(n):
        gains[i] = es / (scale[n + i] * rate_scale[i])
        gains[n + i] = -es / (scale[i] * rate_scale[n + i])
    src = np.array([n + i if i < n else i - n for i in range(2 * n)], dtype=np.int64)
    return z, t, gains, src


def glorot_init(sizes, seed):
    """Glorot/Xavier uniform weights U(-a, a), a = sqrt(6 / (in + out))
    (Glorot & Bengio, 2010), zero biases; W is [outputs][inputs] as in Visviva."""
    rng = np.random.default_rng(seed)
    params = []
    for i, o in zip(sizes[:-1], sizes[1:]):
        a = math.sqrt(6.0 / (i + o))
        w = rng.uniform(-a, a, size=(o, i)).astype(np.float32)
        params.append((w, np.zeros(o, dtype=np.float32)))
    return params


def initial_params(args, sizes):
    """Visviva's initial parameters from --init (three lines per layer:
    `outputs inputs`, weights row by row, biases), else Glorot-uniform."""
    if not args.init:
        return glorot_init(sizes, args.seed)
    with open(args.init) as f:
        lines = [ln.split() for ln in f.read().splitlines() if ln.strip()]
    params = []
    for k in range(0, len(lines), 3):
        o, i = int(lines[k][0]), int(lines[k][1])
        w = np.asarray([float(v) for v in lines[k + 1]], dtype=np.float32).reshape(o, i)
        b = np.asarray([float(v) for v in lines[k + 2]], dtype=np.float32)
        params.append((w, b))
    shapes = [w.shape for w, _ in params]
    expected = [(o, i) for i, o in zip(sizes[:-1], sizes[1:])]
    if shapes != expected:
        raise SystemExit(f"{args.init}: layer shapes {shapes}, expected {expected}")
    return params


def warmup_steps(total):
    # Visviva: ((total as f32 * 0.02) as usize).max(1)
    return max(int(np.float32(total) * np.float32(WARMUP_FRACTION)), 1)


def lr_at(step, peak, total):
    """Linear warm-up then half-cosine decay to peak * LR_FLOOR (optim.rs)."""
    warm = warmup_steps(total)
    if step < warm:
        return peak * (step + 1) / warm
    span = max(total - warm, 1)
    frac = min((step - warm) / span, 1.0)
    cos = 0.5 * (1.0 + math.cos(math.pi * frac))
    return peak * (LR_FLOOR + (1.0 - LR_FLOOR) * cos)


def epoch_orders(rows, batch, steps, seed):
    """Row indices of every step: a fresh permutation per epoch, cut into
    consecutive batches (as Visviva's loop does; the generator differs)."""
    rng = np.random.default_rng(seed ^ 0x9E3779B9)
    out = []
    while len(out) < steps:
        perm = rng.permutation(rows)
        for s in range(0, rows, batch):
            if len(out) == steps:
                break
            out.append(perm[s:s + batch])
    return out


def write_summary(path, summary):
    """Write the JSON summary atomically (temp file in the same folder, then rename)."""
    folder = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(dir=folder, suffix=".tmp")
    try:
        with os.fdopen(fd, "w") as f:
            json.dump(summary, f, indent=2)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.remove(tmp)
        raise
