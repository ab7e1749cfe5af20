"""Invented scenario: an orchard's frost alarm, trained from the team's pinned starting point.

Twelve sensor readings per hour (air and leaf temperature at three heights, humidity, wind,
cloud cover ...) go through two hidden layers to one logit: "frost within six hours". Every run
starts from the same seeded weights, fetched from seedbed and verified, so two members of the
team comparing runs compare training, not luck.

    python frost_alarm.py --server http://127.0.0.1:8600

Plain numpy; the data are random numbers standing in for sensor logs.
"""

from __future__ import annotations

import argparse

import numpy as np

from seedbed_client import Client, DenseSpec, NetworkSpec, NormSpec


def describe() -> NetworkSpec:
    return NetworkSpec(seed="orchard/frost-alarm/2026").add(
        DenseSpec("sensors.0", 12, 32, activation="relu"),
        NormSpec("sensors.norm", 32),
        DenseSpec("sensors.1", 32, 16, activation="tanh"),
        DenseSpec("alarm", 16, 1, activation="sigmoid", role="output", class_prior=0.05),
    )


def forward(w: dict[str, np.ndarray], x: np.ndarray) -> np.ndarray:
    h = np.maximum(x @ w["sensors.0.weight"].T + w["sensors.0.bias"], 0.0)
    h = (h - h.mean(axis=1, keepdims=True)) / (h.std(axis=1, keepdims=True) + 1e-5)
    h = h * w["sensors.norm.scale"] + w["sensors.norm.shift"]
    h = np.tanh(h @ w["sensors.1.weight"].T + w["sensors.1.bias"])
    logit = h @ w["alarm.weight"].T + w["alarm.bias"]
    return 1.0 / (1.0 + np.exp(-logit[:, 0]))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--server", help="seedbed URL (default SEEDBED_URL or 127.0.0.1:8600)")
    args = parser.parse_args(argv)

    net = describe()
    with Client(args.server) as client:
        for entry in client.plan(net)["tensors"]:
            print(f"{entry['tensor']:<20} {entry['method']:<10} std={entry['std']}")
        weights = client.weights(net, format="npz")  # verified; cached for the next run
    print(f"weights from {weights.source}, algorithm {weights.algorithm}")

    rng = np.random.default_rng(7)  # stand-in sensor data
    x = rng.normal(size=(256, 12)).astype(np.float32)
    p = forward(weights, x)
    # The class prior set the output bias to log(0.05/0.95): predictions start near 5 %.
    print(f"mean predicted frost probability before training: {p.mean():.3f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
