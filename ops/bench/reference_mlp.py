#!/usr/bin/env python3
"""Outside reference for the defaults table: a 64-64 multilayer perceptron
(scikit-learn's MLPRegressor with early stopping, its other settings left at
their defaults) and ordinary least squares, each fitted once on the delivered
rows of a split and scored by MAE on that split's kept-back rows; the
perceptron is the mean of five seeds.

The splits come from the Rust side, so both programs score exactly the same
rows:

    ./target/release/examples/bench_defaults --seeds 10 --dump /tmp/splits
    python3 ops/bench/reference_mlp.py /tmp/splits

Measurement only: scikit-learn is not a dependency of tidegate.
"""

import glob
import os
import re
import sys

try:
    import numpy as np
    from sklearn.linear_model import LinearRegression
    from sklearn.neural_network import MLPRegressor
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler
except ImportError:
    print("scikit-learn is not installed (pip install scikit-learn); no reference figure")
    sys.exit(0)


def load(path):
    data = np.loadtxt(path, delimiter=",", ndmin=2)
    return data[:, :-1], data[:, -1]


def main(folder):
    pattern = re.compile(r"(\w+)-(\d+)-delivered\.csv$")
    found = {}
    for path in glob.glob(os.path.join(folder, "*-delivered.csv")):
        m = pattern.search(os.path.basename(path))
        if m:
            found.setdefault(m.group(1), []).append(int(m.group(2)))
    print("| data set | seed | OLS MAE | 64-64 MLP MAE (mean of 5 seeds) | MLP / OLS |")
    print("|---|---|---|---|---|")
    for name in sorted(found):
        ratios, ols_all, mlp_all = [], [], []
        for seed in sorted(found[name]):
            x, y = load(os.path.join(folder, f"{name}-{seed}-delivered.csv"))
            xk, yk = load(os.path.join(folder, f"{name}-{seed}-kept.csv"))
            ols = np.mean(np.abs(LinearRegression().fit(x, y).predict(xk) - yk))
            maes = []
            for s in range(5):
                net = make_pipeline(
                    StandardScaler(),
                    MLPRegressor(
                        hidden_layer_sizes=(64, 64),
                        early_stopping=True,
                        max_iter=1000,
                        random_state=s,
                    ),
                )
                # The target standardised too, as tidegate trains on it.
                mu, sd = y.mean(), y.std()
                net.fit(x, (y - mu) / sd)
                maes.append(np.mean(np.abs(net.predict(xk) * sd + mu - yk)))
            mlp = float(np.mean(maes))
            ratios.append(mlp / ols)
            ols_all.append(ols)
            mlp_all.append(mlp)
            print(f"| {name} | {seed} | {ols:.4f} | {mlp:.4f} | {mlp / ols:.4f} |")
        print(
            f"| {name} | mean | {np.mean(ols_all):.4f} | {np.mean(mlp_all):.4f} | "
            f"{np.mean(ratios):.4f} |"
        )


if __name__ == "__main__":
    main(sys.argv[1] if len(sys.argv) > 1 else "/tmp/splits")
