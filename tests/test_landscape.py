"""Loss-landscape slices: the plane's origin, its axes, filter normalisation (Li et al. 2018)."""
import numpy as np
import pytest
import torch

import nbkit
import replay_setup as rs
from nbkit.analyze.landscape import filter_normalised_direction, landscape_slice, plane_coordinates
from nbkit.errors import NbkitError


@pytest.fixture(scope="module")
def replays(tmp_path_factory):
    torch.set_num_threads(1)
    parent = rs.record_run(tmp_path_factory.mktemp("landscape") / "run", steps=40, keyframe_every=10)
    out = nbkit.replay(parent, rs.make_model(), rs.step_fn, rs.Batches(), start=10, steps=30, progress=False,
                       optimizers={"adam": rs.adam, "sgd-m": rs.sgd_momentum})
    return parent, out


def start_loss(run, step, batch):
    model = rs.make_model()
    model.load_state_dict(run.keyframe(step)["model"])
    model.eval()
    with torch.no_grad():
        return float(rs.step_fn(model, batch))


def test_the_origin_of_the_plane_has_the_start_points_loss(replays):
    parent, out = replays
    batch = rs.Batches()(10)
    piece = landscape_slice(rs.make_model(), rs.step_fn, batch, out, resolution=9, progress=False)
    i, j = int(np.flatnonzero(piece.alpha == 0)[0]), int(np.flatnonzero(piece.beta == 0)[0])
    assert piece.origin_step == 10
    assert piece.loss[j, i] == start_loss(parent, 10, batch) == piece.origin_loss
    # both paths start at the origin; the first run ends on the first axis, the second above it
    for name in out:
        np.testing.assert_allclose(piece.paths[name][0], [0, 0], atol=1e-9)
    end_a, end_b = piece.paths["adam"][-1], piece.paths["sgd-m"][-1]
    assert end_a[0] > 0 and abs(end_a[1]) < 1e-6 * end_a[0] and end_b[1] > 0
    assert piece.alpha.min() <= min(p[:, 0].min() for p in piece.paths.values())
    assert piece.alpha.max() >= max(p[:, 0].max() for p in piece.paths.values())


def test_one_run_uses_filter_normalised_random_directions(replays):
    parent, out = replays
    batch = rs.Batches()(10)
    piece = landscape_slice(rs.make_model(), rs.step_fn, batch, {"adam": out["adam"]}, resolution=5, progress=False)
    assert piece.axes == "random filter-normalised directions"
    i, j = int(np.flatnonzero(piece.alpha == 0)[0]), int(np.flatnonzero(piece.beta == 0)[0])
    assert piece.loss[j, i] == start_loss(parent, 10, batch)


def test_filter_normalisation_matches_each_filters_norm():
    """Li et al. 2018, section 4: ‖d_i‖ = ‖θ_i‖ for every filter i (a row of a weight)."""
    model = rs.make_model()
    state = dict(model.named_parameters())
    names = list(state)
    direction = filter_normalised_direction(state, names, torch.Generator().manual_seed(0))
    offset = 0
    for name in names:
        theta = state[name].detach().double()
        part = direction[offset:offset + theta.numel()].reshape(theta.shape)
        offset += theta.numel()
        if theta.dim() == 1:
            assert torch.all(part == 0)           # biases: no direction
        else:
            torch.testing.assert_close(part.norm(dim=1), theta.norm(dim=1))


def test_plane_coordinates_recover_known_points():
    origin = torch.zeros(4, dtype=torch.float64)
    d1 = torch.tensor([1.0, 1.0, 0.0, 0.0], dtype=torch.float64)
    d2 = torch.tensor([0.0, 1.0, 2.0, 0.0], dtype=torch.float64)
    points = torch.stack([2 * d1 - 3 * d2, 0.5 * d2 + torch.tensor([0, 0, 0, 7.0], dtype=torch.float64)])
    np.testing.assert_allclose(plane_coordinates(points, origin, d1, d2), [[2, -3], [0, 0.5]], atol=1e-12)


def test_runs_without_a_shared_start_are_refused(replays, tmp_path):
    parent, out = replays
    other = rs.record_run(tmp_path / "other", steps=12, keyframe_every=10, seed=3)
    later = nbkit.replay(parent, rs.make_model(), rs.step_fn, rs.Batches(), start=20, steps=5, progress=False,
                         to=tmp_path / "later")["recorded"]
    with pytest.raises(NbkitError, match="share no start point"):
        landscape_slice(rs.make_model(), rs.step_fn, rs.Batches()(10), {"a": out["adam"], "b": later}, progress=False)
    assert len(other) == 12


def test_the_landscape_view_moves_its_markers_with_step(replays, tmp_path):
    parent, out = replays
    view = nbkit.landscape(rs.make_model(), rs.step_fn, rs.Batches()(10), out, resolution=5, progress=False)
    view.step = 25                             # markers sit at the keyframe at or before the cursor: step 20
    k = list(view.slice.path_steps["sgd-m"]).index(20)
    np.testing.assert_allclose(view.panel.markers["sgd-m"].get_xydata()[0], view.slice.paths["sgd-m"][k])
    assert view.to_png(tmp_path / "slice.png").stat().st_size > 10_000


def test_a_bit_exact_replay_beside_its_parent_does_not_collapse_the_plane(replays):
    """The parent and its recorded-optimizer replay end at one point; the next run spans the plane."""
    parent, out = replays
    exact = nbkit.replay(parent, rs.make_model(), rs.step_fn, rs.Batches(), start=10, steps=30, progress=False,
                         to=parent.path.parent / "exact")["recorded"]
    piece = landscape_slice(rs.make_model(), rs.step_fn, rs.Batches()(10),
                            {"run": parent, "recorded": exact, "sgd-m": out["sgd-m"]}, resolution=5, progress=False)
    assert piece.axes == "end points" and "sgd-m" in piece.axis_labels[1]
    np.testing.assert_allclose(piece.paths["run"][-1], piece.paths["recorded"][-1], atol=1e-9)
