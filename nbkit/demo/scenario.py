"""The demo scenario: predict a greenhouse's leaf temperature one hour ahead from 12 sensors.

Everything is generated in code by a seeded generator (no data files). The first run has three
planted faults a practitioner could plausibly make:
  * the sensor calibration offset is a parameter of the model but was left out of the optimizer
    (an orphan tensor);
  * the three light sensors arrive in the wrong unit, about 1e-7 of the other features, so the
    first layer's three light columns get gradients below Adam's epsilon and barely learn, while the
    other nine columns of the same weight train normally (eps-dominated, naming the three columns);
  * the learning rate after the warm-up was configured ten times too high, and the loss spikes
    once the step size passes the stability limit set by the curvature (over-stability-limit).
"""
from __future__ import annotations

import math

import torch
from torch import nn

from nbkit.record.attach import record
from nbkit.recording import load

SENSORS = ("air temperature [°C]", "relative humidity [%]", "CO2 [ppm]", "vent opening [%]",
           "heating pipe temperature [°C]", "outside temperature [°C]", "wind speed [m/s]",
           "screen closure [0-1]", "hour of day (sine)",
           "light above canopy [µmol/m²/s]", "light mid canopy [µmol/m²/s]", "light outside [µmol/m²/s]")
LIGHT = slice(9, 12)
WRONG_UNIT = 1e-7          # the light block's planted unit error
HOURS = 24 * 60            # two months of hourly readings
BATCH = 64
STEPS = 600
PEAK_LR = 0.1              # the configured rate after warm-up: a typo for 1e-2 (the planted spike)
WARMUP_LR = 0.01           # the warm-up's end point
WARMUP_STEPS = 300


def sensor_data(seed: int = 7, *, wrong_unit: bool = True):
    """(features (HOURS, 12) float32, next-hour leaf temperature (HOURS,) float32)."""
    g = torch.Generator().manual_seed(seed)
    hour = torch.arange(HOURS, dtype=torch.float64)
    day = 2 * math.pi * hour / 24
    noise = lambda scale: scale * torch.randn(HOURS, generator=g, dtype=torch.float64)  # noqa: E731
    outside = 14 + 6 * torch.sin(day - 2.0) + noise(1.5)
    light_out = (1400 * torch.sin(day - 1.6).clamp(min=0)) * (0.6 + 0.4 * torch.rand(HOURS, generator=g, dtype=torch.float64))
    screen = (light_out > 900).double() * 0.7
    light_top = light_out * (1 - 0.6 * screen) * 0.8
    light_mid = light_top * 0.45 + noise(10).abs()
    vent = (40 * torch.sigmoid((outside - 15) / 2) + noise(5)).clamp(0, 100)
    pipe = (55 - 1.5 * outside + noise(2)).clamp(25, 70)
    air = 0.45 * outside + 0.18 * pipe + 0.004 * light_top - 0.04 * vent + 6 + noise(0.5)
    humidity = (85 - 1.2 * (air - 18) + 0.1 * vent + noise(3)).clamp(40, 98)
    co2 = (900 - 5 * vent - 0.15 * light_top + noise(40)).clamp(380, 1200)
    wind = (3 + 2 * torch.sin(day / 7) + noise(1)).abs()
    leaf = (air + 0.0025 * light_top * (1 - screen) - 0.03 * (humidity - 70) - 0.012 * vent
            + 0.02 * (pipe - 40) - 0.05 * wind + noise(0.3))
    # The leaf lags the air: next hour it has moved 30 % of the way towards the current drivers.
    leaf_next = 0.7 * leaf + 0.3 * (air + 0.5) + noise(0.1)
    readings = torch.stack([air, humidity, co2, vent, pipe, outside, wind, screen, torch.sin(day),
                            light_top, light_mid, light_out], dim=1)
    features = (readings - readings.mean(0)) / readings.std(0)          # unit variance per sensor
    if wrong_unit:
        features[:, LIGHT] *= WRONG_UNIT
    target = (leaf_next - leaf_next.mean()) / leaf_next.std()
    return features.float(), target.float()


class LeafTemperatureNet(nn.Module):
    """One first layer over all twelve sensors + head, plus a learned sensor calibration offset."""

    def __init__(self):
        super().__init__()
        self.sensors = nn.Sequential(nn.Linear(len(SENSORS), 40), nn.Tanh())   # columns: SENSORS, in order
        self.head = nn.Sequential(nn.Linear(40, 32), nn.Tanh(), nn.Linear(32, 1))
        self.calibration_offset = nn.Parameter(torch.zeros(1))

    def forward(self, x):
        return self.head(self.sensors(x)).squeeze(1) + self.calibration_offset


def make_model(seed: int = 0) -> LeafTemperatureNet:
    torch.manual_seed(seed)
    return LeafTemperatureNet()


def optimizer_parameters(model: LeafTemperatureNet):
    """The planted orphan: the calibration offset is forgotten when the optimizer is built."""
    return [*model.sensors.parameters(), *model.head.parameters()]


def warmup_lr(step: int, peak: float = PEAK_LR) -> float:
    """Linear warm-up from WARMUP_LR/10 to WARMUP_LR over WARMUP_STEPS, then the configured rate
    `peak`. The planted fault: the configured rate has a typo (1e-1 where 1e-2 was meant), so the
    rate jumps tenfold at the end of the warm-up."""
    if step >= WARMUP_STEPS:
        return peak
    return WARMUP_LR * (0.1 + 0.9 * step / WARMUP_STEPS)


class Batches:
    """batches(step) -> (inputs, targets): the same mini-batch for the same step, every time."""

    def __init__(self, features, targets, batch: int = BATCH, seed: int = 11):
        self.features, self.targets, self.batch, self.seed = features, targets, batch, seed

    def __call__(self, step: int):
        g = torch.Generator().manual_seed(self.seed * 1_000_003 + step)
        rows = torch.randint(0, len(self.features), (self.batch,), generator=g)
        return self.features[rows], self.targets[rows]


criterion = nn.MSELoss()


def step_fn(model, batch):
    """The scenario's loss on one batch (used by curvature estimates and replays)."""
    inputs, targets = batch
    return criterion(model(inputs), targets)


# Replay factories: module-level so they can be pickled for replays in worker processes. Each
# receives the recorded parameter groups (the same tensors: the orphan stays an orphan).
def sgd_momentum(groups):
    return torch.optim.SGD(groups, lr=0.05, momentum=0.9)


def rmsprop(groups):
    return torch.optim.RMSprop(groups, lr=1e-3)


def adam_lower_lr(groups):
    return torch.optim.Adam(groups, lr=0.01)


REPLAY_OPTIMIZERS = {"sgd-momentum": sgd_momentum, "rmsprop": rmsprop, "adam-lr-0.01": adam_lower_lr}


def train_first_run(path, *, steps: int = STEPS, curvature_every: int = 25, peak_lr: float = PEAK_LR,
                    overwrite: bool = True):
    """The first run, recorded: Adam with the too-high warm-up, the orphan and the unit error."""
    features, targets = sensor_data()
    batches = Batches(features, targets)
    model = make_model()
    optimizer = torch.optim.Adam(optimizer_parameters(model), lr=warmup_lr(0, peak_lr))
    # every=1: the demo's findings read every step in full (the default, "auto", thins after 50 steps)
    with record(model, optimizer, path, criterion=criterion, curvature_every=curvature_every,
                keyframe_every=100, every=1, overwrite=overwrite,
                unit_names={"sensors.0.weight": {"columns": list(SENSORS)}}):
        for step in range(steps):
            for group in optimizer.param_groups:
                group["lr"] = warmup_lr(step, peak_lr)
            inputs, target = batches(step)
            optimizer.zero_grad()
            loss = criterion(model(inputs), target)
            loss.backward()
            optimizer.step()
    return load(path), batches
