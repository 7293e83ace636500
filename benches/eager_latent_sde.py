"""A plain latent SDE written directly in an eager autodiff framework (PyTorch), as a
reference point for the crate's default fit on the same tables and split.

Model (the textbook latent SDE, nothing from the crate): latent dimension d = D, prior
dZ = b(Z, t) dt + dW from Z_0 = 0 on [0, 1] with 20 Euler-Maruyama steps, b an MLP of (z, t);
posterior drift b + u with the control u an MLP of (z, t, y); decoder y | Z_1 ~ N(m(Z_1),
diag(s^2)) with m an MLP and s learned per column. Loss per row: the control cost
1/2 sum |u|^2 h plus -log p(y | Z_1) (the negative ELBO of the Euler-Maruyama model).
Training: all training rows, batches of 64, 400 epochs of Adam (learning rate 3e-3) with
cosine decay, no early stopping. Evaluation: the importance-weighted log-likelihood with K =
128 posterior paths per held-out row (Burda, Grosse & Salakhutdinov 2016), the Girsanov
log-weight -sum u dW - 1/2 sum |u|^2 h added to log p(y | Z_1), in the data's units.

Split: rows with i % 5 == 4 are held out (as in the crate's tests). Columns are standardised
with the training rows' mean and population standard deviation.

Usage: python3 benches/eager_latent_sde.py TABLE.csv [--seed S] [--epochs E]
Prints one JSON line: held-out log-likelihood per dimension, ELBO per dimension, seconds.
"""

import argparse
import json
import math
import time

import numpy as np
import torch


def mlp(n_in, n_out, width=64, depth=2):
    layers, k = [], n_in
    for _ in range(depth):
        layers += [torch.nn.Linear(k, width), torch.nn.SiLU()]
        k = width
    layers.append(torch.nn.Linear(k, n_out))
    return torch.nn.Sequential(*layers)


class LatentSde(torch.nn.Module):
    def __init__(self, dim, steps=20):
        super().__init__()
        self.d, self.steps = dim, steps
        self.prior = mlp(dim + 1, dim)
        self.control = mlp(2 * dim + 1, dim)
        self.decoder = mlp(dim, dim)
        self.log_s = torch.nn.Parameter(torch.zeros(dim))

    def paths(self, y, noise):
        """Posterior paths for rows y with increments noise (steps, n, d): the end state,
        the control cost and the Girsanov log-weight log dP/dQ per row."""
        n, h = y.shape[0], 1.0 / self.steps
        z = torch.zeros(n, self.d)
        cost = torch.zeros(n)
        logw = torch.zeros(n)
        for k in range(self.steps):
            t = torch.full((n, 1), k * h)
            b = self.prior(torch.cat([z, t], 1))
            u = self.control(torch.cat([z, t, y], 1))
            cost = cost + 0.5 * (u * u).sum(1) * h
            logw = logw - (u * noise[k]).sum(1) - 0.5 * (u * u).sum(1) * h
            z = z + (b + u) * h + noise[k]
        return z, cost, logw

    def nll(self, z, y):
        s = self.log_s.exp()
        r = (y - self.decoder(z)) / s
        return (0.5 * r * r + self.log_s + 0.5 * math.log(2 * math.pi)).sum(1)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("table")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--epochs", type=int, default=400)
    a = ap.parse_args()
    torch.manual_seed(a.seed)
    rng = np.random.default_rng(a.seed)
    torch.set_num_threads(1)
    x = np.loadtxt(a.table, delimiter=",", skiprows=1, ndmin=2)
    idx = np.arange(len(x))
    train, test = x[idx % 5 != 4], x[idx % 5 == 4]
    mean, sd = train.mean(0), train.std(0)
    ytr = torch.tensor((train - mean) / sd, dtype=torch.float32)
    yte = torch.tensor((test - mean) / sd, dtype=torch.float32)
    n, d = ytr.shape
    model = LatentSde(d)
    opt = torch.optim.Adam(model.parameters(), lr=3e-3)
    batches = math.ceil(n / 64)
    sched = torch.optim.lr_scheduler.CosineAnnealingLR(opt, T_max=a.epochs * batches)
    h = 1.0 / model.steps
    t0 = time.time()
    for _ in range(a.epochs):
        order = torch.tensor(rng.permutation(n))
        for b in range(batches):
            y = ytr[order[b * 64:(b + 1) * 64]]
            noise = torch.randn(model.steps, y.shape[0], d) * math.sqrt(h)
            z, cost, _ = model.paths(y, noise)
            loss = (cost + model.nll(z, y)).mean()
            opt.zero_grad()
            loss.backward()
            opt.step()
            sched.step()
    seconds = time.time() - t0
    jac = -np.log(sd).sum()
    k = 128
    with torch.no_grad():
        ll, elbo = [], []
        for i in range(0, len(yte), 16):
            y = yte[i:i + 16].repeat_interleave(k, 0)
            noise = torch.randn(model.steps, y.shape[0], d) * math.sqrt(h)
            z, cost, logw = model.paths(y, noise)
            nll = model.nll(z, y)
            lw = (logw - nll).view(-1, k)
            ll += (torch.logsumexp(lw, 1) - math.log(k)).tolist()
            elbo += (-(cost + nll)).view(-1, k).mean(1).tolist()
    print(json.dumps({
        "table": a.table,
        "seed": a.seed,
        "epochs": a.epochs,
        "rows_train": int(n),
        "rows_test": int(len(yte)),
        "loglik_per_dim": (float(np.mean(ll)) + jac) / d,
        "elbo_per_dim": (float(np.mean(elbo)) + jac) / d,
        "fit_seconds": round(seconds, 1),
    }))


if __name__ == "__main__":
    main()
