#!/usr/bin/env python3
"""Scaling model on paper for data-parallel fits over MPI (see benches/README.md).

Per optimiser step a process computes its share of the global batch B and then takes part in
two allreduces: the gradient (parameters x 4 bytes) and three loss figures. With a fixed cost
per step `a` (optimiser update, buffers) that does not shrink with P, and `c` seconds of
compute per row, one step on P machines takes

    a + c B / P + T(P),   T(P) = 2 * (2 log2(P) alpha) + 2 (P - 1) / P * S / beta

where the allreduce follows Rabenseifner's reduce-scatter + allgather (latency 2 log2 P
alpha, bandwidth 2 (P-1)/P S/beta; Thakur, Rabenseifner & Gropp 2005, "Optimization of
collective communication operations in MPICH", IJHPCA 19(1), Section 4), counted once more
in latency for the small figures' reduction. Efficiency is speedup / P with speedup
(a + c B) / (a + c B / P + T(P)). The smallest power-of-two batch with efficiency >= 0.8 is
B >= 4 P (a + T) / c.

Usage: scaling_model.py --a-ms 0.6 --c-us 22.5 --params 15896 [--alpha-us 25] [--gbit 10]
"""
import argparse
import math


def main():
    p = argparse.ArgumentParser()
    p.add_argument("--a-ms", type=float, required=True, help="fixed cost per step (ms)")
    p.add_argument("--c-us", type=float, required=True, help="compute per row (us)")
    p.add_argument("--params", type=int, required=True, help="parameter count")
    p.add_argument("--alpha-us", type=float, default=25.0, help="latency per message (us)")
    p.add_argument("--gbit", type=float, default=10.0, help="link bandwidth (Gbit/s)")
    p.add_argument("--batch", type=int, default=1024, help="global batch")
    a = p.parse_args()
    fixed, c = a.a_ms * 1e-3, a.c_us * 1e-6
    size, alpha, beta = 4 * a.params, a.alpha_us * 1e-6, a.gbit * 1e9 / 8

    def comm(procs):
        if procs == 1:
            return 0.0
        lat = 2 * (2 * math.log2(procs) * alpha)
        return lat + 2 * (procs - 1) / procs * size / beta

    def efficiency(procs, batch):
        one = fixed + c * batch
        return one / (fixed + c * batch / procs + comm(procs)) / procs

    print(f"allreduce of {size} bytes; a = {a.a_ms} ms, c = {a.c_us} us/row, "
          f"alpha = {a.alpha_us} us, {a.gbit} Gbit/s")
    print("| machines | T(P) ms | efficiency at B = %d | batch for >= 80 %% |" % a.batch)
    print("|---|---|---|---|")
    for procs in (2, 8, 64):
        need = 4 * procs * (fixed + comm(procs)) / c
        b80 = 2 ** math.ceil(math.log2(need))
        print(f"| {procs} | {comm(procs) * 1e3:.2f} | {efficiency(procs, a.batch):.2f} | "
              f"{b80} (efficiency {efficiency(procs, b80):.2f}) |")


if __name__ == "__main__":
    main()
