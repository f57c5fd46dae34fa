"""Defective sensor pixels: found when isolated, never on a thread, repaired by their neighbours."""

import numpy as np

from thinning.measure.defects import DefectivePixels, find_defects


def _backlit(rng, shape=(120, 160), level=200.0, noise=2.0):
    return level + noise * rng.standard_normal(shape)


def test_isolated_stuck_pixels_are_found_and_a_thread_is_not():
    rng = np.random.default_rng(1)
    frame = _backlit(rng)
    frame[:, 80] = 40.0          # a one-pixel-wide thread along the axis: never a defect
    frame[30:33, 20:23] = 60.0   # a 3x3 dust speck: its pixels have dark neighbours
    stuck = [(10, 10), (50, 120), (90, 40)]
    for r, c in stuck:
        frame[r, c] = 0.0        # dead
    frame[70, 140] = 255.0       # hot
    found = {tuple(p) for p in find_defects(np.clip(frame, 0, 255).astype(np.uint8))}
    assert found == set(stuck) | {(70, 140)}


def test_repair_takes_the_neighbours_median_and_keeps_the_input():
    rng = np.random.default_rng(2)
    frame = np.clip(_backlit(rng), 0, 255).astype(np.uint8)
    frame[40, 40] = 0
    defects = DefectivePixels()
    defects.update(frame)
    assert len(defects) == 1
    fixed = defects.repair(frame)
    assert frame[40, 40] == 0  # the caller's frame is untouched
    ring = np.delete(frame[39:42, 39:42].ravel(), 4)
    assert fixed[40, 40] == np.rint(np.median(ring))
    assert (np.delete(fixed.ravel(), 40 * 160 + 40) == np.delete(frame.ravel(), 40 * 160 + 40)).all()


def test_a_noisy_texture_is_no_defect_map():
    # salt-and-pepper over a whole frame is no sensor defect: nothing is repaired
    rng = np.random.default_rng(3)
    frame = np.clip(_backlit(rng), 0, 255).astype(np.uint8)
    frame[rng.random(frame.shape) < 0.01] = 0
    assert find_defects(frame).size == 0
