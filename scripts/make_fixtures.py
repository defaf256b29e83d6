"""Make the demo fixtures: three small trained models on simulated data, and their recordings.

The scenario is invented. The Millbrook Vale water cooperative (fictional) forecasts the
pressure at a district metering node 15 minutes ahead from three sensors (inlet flow,
reservoir level, booster pump speed) with a Keras LSTM, watches its booster pumps with a
PyTorch GRU that classifies 3-axis vibration windows as normal, imbalance or bearing wear, and
reads each asset's maintenance log (a variable-length sequence of event types, padded with 0)
with a PyTorch packed bidirectional LSTM that flags routine, leak-risk and pump-risk assets.
All data are simulated here; nothing comes from a real network, pump or log.

Deterministic: every generator is seeded, TensorFlow runs with op determinism, PyTorch with
deterministic algorithms, one thread each. Runs in a few minutes on a 2-core CPU.

Usage: .venv/bin/python scripts/make_fixtures.py [--out fixtures/demo]
"""

from __future__ import annotations

import argparse
import csv
import os
import shutil
from pathlib import Path

import numpy as np

SEED = 20261201
STEP_MINUTES = 15
WINDOW = 48  # 12 hours of 15-minute samples
SENSORS = ("inlet_flow_lps", "reservoir_level_m", "pump_speed_pct")
CLASSES = ("normal", "imbalance", "bearing_wear")


# ----- water network simulation ----------------------------------------------------------------
def simulate_network(days: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Sensors [steps, 3] and node pressure [steps] for ``days`` of 15-minute samples."""
    n = days * 24 * 60 // STEP_MINUTES
    t = np.arange(n) * STEP_MINUTES / 60.0  # hours
    daily = 1.0 + 0.35 * np.sin(2 * np.pi * (t - 7) / 24) + 0.15 * np.sin(4 * np.pi * (t - 18) / 24)
    flow = 42.0 * daily + rng.normal(0, 1.5, n)
    level = np.empty(n)
    level[0] = 4.2
    pump = np.clip(55 + 30 * (daily - 1.0) + rng.normal(0, 2.0, n), 20, 100)
    for i in range(1, n):
        inflow = 0.011 * pump[i - 1]
        step = 0.05 * (inflow - 0.012 * flow[i - 1]) + rng.normal(0, 0.005)
        level[i] = np.clip(level[i - 1] + step, 2.5, 6.0)
    head = 2.1 * level + 0.09 * pump - 0.0009 * flow**2
    pressure = np.convolve(head, np.ones(3) / 3, mode="same") + rng.normal(0, 0.05, n)
    sensors = np.stack([flow, level, pump], axis=1).astype(np.float32)
    return sensors, pressure.astype(np.float32)


def network_windows(sensors: np.ndarray, pressure: np.ndarray, stride: int) -> tuple[np.ndarray, np.ndarray]:
    """Windows [samples, WINDOW, 3] and the next step's pressure [samples, 1]."""
    starts = range(0, len(sensors) - WINDOW - 1, stride)
    x = np.stack([sensors[s : s + WINDOW] for s in starts])
    y = np.stack([pressure[s + WINDOW : s + WINDOW + 1] for s in starts])
    return x.astype(np.float32), y.astype(np.float32)


def write_csv(path: Path, sensors: np.ndarray, pressure: np.ndarray) -> None:
    with open(path, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(["minute", *SENSORS, "node_pressure_m"])
        for i, (row, p) in enumerate(zip(sensors, pressure, strict=True)):
            w.writerow([i * STEP_MINUTES, *(f"{v:.4f}" for v in row), f"{p:.4f}"])


def train_forecaster(out: Path, rng: np.random.Generator) -> None:
    os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "3")
    from seqgate.util.frameworks import import_keras

    keras = import_keras()
    import tensorflow as tf

    keras.utils.set_random_seed(SEED)
    tf.config.experimental.enable_op_determinism()
    tf.config.threading.set_intra_op_parallelism_threads(1)
    tf.config.threading.set_inter_op_parallelism_threads(1)
    sensors, pressure = simulate_network(days=28, rng=rng)
    x, y = network_windows(sensors, pressure, stride=2)
    from keras import layers

    norm = layers.Normalization(name="sensor_scaling")
    norm.adapt(sensors)
    inp = keras.Input((None, len(SENSORS)), name="sensors")
    h = norm(inp)
    h = layers.LSTM(32, return_sequences=True, name="encoder")(h)
    h = layers.LSTM(16, name="summary")(h)
    h = layers.Dense(16, activation="relu", name="mix")(h)
    # Start the output at the mean pressure so training only learns the variation.
    outp = layers.Dense(1, name="pressure_next",
                        bias_initializer=keras.initializers.Constant(float(y.mean())))(h)
    model = keras.Model(inp, outp, name="pressure_forecaster")
    model.compile(optimizer=keras.optimizers.Adam(3e-3), loss="mse")
    model.fit(x, y, epochs=12, batch_size=64, verbose=0, shuffle=True)
    model.save(out / "pressure_forecaster.keras")
    # Field recording: a later week the model never saw, windows as the product sends them.
    field_s, field_p = simulate_network(days=7, rng=np.random.default_rng(SEED + 1))
    fx, fy = network_windows(field_s, field_p, stride=4)
    np.savez(out / "field_week.npz", sensors=fx[:160], targets=fy[:160])
    write_csv(out / "field_week.csv", field_s[:400], field_p[:400])
    mse = float(model.evaluate(fx, fy, verbose=0))
    print(f"pressure forecaster: field-week RMSE {mse ** 0.5:.3f} m (target std {fy.std():.3f} m) "
          f"over {len(fx)} windows")


# ----- pump vibration simulation ---------------------------------------------------------------
VIB_STEPS = 128  # samples per window (a short burst at the accelerometer's rate)


def simulate_vibration(n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Windows [n, VIB_STEPS, 3] of 3-axis acceleration and labels [n] (0, 1, 2)."""
    labels = rng.integers(0, 3, n)
    t = np.arange(VIB_STEPS) / VIB_STEPS
    x = np.empty((n, VIB_STEPS, 3), np.float32)
    for i, c in enumerate(labels):
        shaft = rng.uniform(6, 9)
        amp = rng.uniform(0.4, 0.6) * (2.2 if c == 1 else 1.0)
        phase = rng.uniform(0, 2 * np.pi, 3)
        base = np.stack([amp * np.sin(2 * np.pi * shaft * t + ph) for ph in phase], axis=1)
        noise = rng.normal(0, 0.15, (VIB_STEPS, 3))
        if c == 2:
            hits = rng.choice(VIB_STEPS, size=6, replace=False)
            burst = np.zeros((VIB_STEPS, 3))
            burst[hits] = rng.normal(0, 1.8, (6, 3))
            noise += burst
        x[i] = base + noise
    return x, labels.astype(np.int64)


# The classifier's module lives in the fixtures as a plain source file (seqgate runs it as the
# factory); training imports it from there, so the committed file is the one definition.
VIBRATION_MODULE = Path(__file__).resolve().parents[1] / "fixtures/demo/vibration/vibration_model.py"


def train_classifier(out: Path, rng: np.random.Generator) -> None:
    import importlib.util

    import torch

    torch.manual_seed(SEED)
    torch.set_num_threads(1)
    torch.use_deterministic_algorithms(True)
    if (out / "vibration_model.py").resolve() != VIBRATION_MODULE:
        shutil.copyfile(VIBRATION_MODULE, out / "vibration_model.py")
    spec = importlib.util.spec_from_file_location("vibration_model", out / "vibration_model.py")
    assert spec and spec.loader
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    model = mod.build_model()
    x, y = simulate_vibration(900, rng)
    xt, yt = torch.from_numpy(x), torch.from_numpy(y)
    opt = torch.optim.Adam(model.parameters(), lr=4e-3)
    for _epoch in range(8):
        perm = torch.from_numpy(rng.permutation(len(x)))
        for k in range(0, len(x), 64):
            idx = perm[k : k + 64]
            opt.zero_grad()
            probs = model(xt[idx])
            loss = nn_nll(probs, yt[idx])
            loss.backward()
            opt.step()
    model.eval()
    torch.save(model.state_dict(), out / "vibration_model.pt")
    fx, fy = simulate_vibration(120, np.random.default_rng(SEED + 2))
    with torch.inference_mode():
        acc = float((model(torch.from_numpy(fx)).argmax(-1).numpy() == fy).mean())
    np.savez(out / "pump_windows.npz", accel=fx, labels=fy)
    print(f"vibration classifier: field accuracy {acc:.3f} over {len(fx)} windows")


def nn_nll(probs, labels):  # type: ignore[no-untyped-def]
    import torch

    return -torch.log(probs.gather(1, labels[:, None]).clamp_min(1e-7)).mean()


# ----- maintenance logs ------------------------------------------------------------------------
MAX_EVENTS = 40  # a window holds an asset's last 40 log entries at most, padded with id 0
# event-type ids (0 = padding): everyday work, then the signs of a leak, then of a failing pump
ROUTINE_EVENTS = (1, 2, 3, 4, 13, 14)  # inspection ok, valve exercised, meter read, main flushed,
#                                        hydrant tested, chlorine check
LEAK_EVENTS = (5, 6, 7, 8)  # pressure alarm, minor leak repair, corrosion noted, low-pressure complaint
PUMP_EVENTS = (9, 10, 11, 12, 15)  # vibration alert, bearing greased, pump trip, seal replaced, overheating
RISKS = ("routine", "leak_risk", "pump_risk")


def simulate_logs(n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Right-padded event ids [n, MAX_EVENTS] (int64), lengths [n] in 3..MAX_EVENTS, labels [n].

    An at-risk asset's log drifts from routine entries to its risk's signs: the chance that an
    entry is a sign grows linearly along the log (up to 0.6), so the recent end decides.
    """
    labels = rng.integers(0, 3, n)
    lengths = rng.integers(3, MAX_EVENTS + 1, n)
    events = np.zeros((n, MAX_EVENTS), np.int64)
    for i, (c, ln) in enumerate(zip(labels, lengths, strict=True)):
        signs = (ROUTINE_EVENTS, LEAK_EVENTS, PUMP_EVENTS)[c]
        p_sign = 0.05 + 0.55 * np.arange(ln) / MAX_EVENTS if c else np.full(ln, 0.0)
        routine = rng.choice(ROUTINE_EVENTS, ln)
        noise = rng.random(ln) < 0.04  # an odd alarm in any log
        odd = rng.choice(LEAK_EVENTS + PUMP_EVENTS, ln)
        events[i, :ln] = np.where(rng.random(ln) < p_sign, rng.choice(signs, ln), np.where(noise, odd, routine))
    return events, lengths.astype(np.int64), labels.astype(np.int64)


MAINTENANCE_MODULE = VIBRATION_MODULE.parents[1] / "maintenance/maintenance_model.py"


def train_maintenance(out: Path, rng: np.random.Generator) -> None:
    import importlib.util

    import torch

    torch.manual_seed(SEED + 4)
    torch.set_num_threads(1)
    torch.use_deterministic_algorithms(True)
    if (out / "maintenance_model.py").resolve() != MAINTENANCE_MODULE:
        shutil.copyfile(MAINTENANCE_MODULE, out / "maintenance_model.py")
    spec = importlib.util.spec_from_file_location("maintenance_model", out / "maintenance_model.py")
    assert spec and spec.loader
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    model = mod.build_model()
    ev, ln, y = (torch.from_numpy(a) for a in simulate_logs(1500, rng))
    opt = torch.optim.Adam(model.parameters(), lr=1e-2)
    for _epoch in range(6):
        perm = torch.from_numpy(rng.permutation(len(y)))
        for k in range(0, len(y), 64):
            idx = perm[k : k + 64]
            opt.zero_grad()
            loss = nn_nll(model(ev[idx], ln[idx]), y[idx])
            loss.backward()
            opt.step()
    model.eval()
    torch.save(model.state_dict(), out / "maintenance_model.pt")
    fe, fl, fy = simulate_logs(96, np.random.default_rng(SEED + 5))
    with torch.inference_mode():
        acc = float((model(torch.from_numpy(fe), torch.from_numpy(fl)).argmax(-1).numpy() == fy).mean())
    np.savez(out / "service_logs.npz", events=fe, lengths=fl, labels=fy)
    print(f"maintenance classifier: field accuracy {acc:.3f} over {len(fy)} logs "
          f"({int(fl.sum())} events, {int(fl.size * MAX_EVENTS - fl.sum())} padding steps)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default="fixtures/demo")
    ap.add_argument("--only", choices=["pressure", "vibration", "maintenance"], default=None)
    args = ap.parse_args()
    root = Path(args.out)
    for sub in ("pressure", "vibration", "maintenance"):
        (root / sub).mkdir(parents=True, exist_ok=True)
    if args.only in (None, "pressure"):
        train_forecaster(root / "pressure", np.random.default_rng(SEED))
    if args.only in (None, "vibration"):
        train_classifier(root / "vibration", np.random.default_rng(SEED + 3))
    if args.only in (None, "maintenance"):
        train_maintenance(root / "maintenance", np.random.default_rng(SEED + 6))


if __name__ == "__main__":
    main()
