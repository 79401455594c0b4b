"""The batched smallest enclosing circle (ingest.proposals.min_enclosing_circles) against the definition and against
Welzl's algorithm one set at a time (min_enclosing_circle)."""
from __future__ import annotations

import itertools

import numpy as np
import pytest

from protomine.ingest import proposals
from protomine.ingest.proposals import min_enclosing_circle, min_enclosing_circles


def _by_definition(xy: np.ndarray) -> tuple[np.ndarray, float]:
    """From the definition (from memory, elementary geometry): the smallest circle holding a finite set touches 2 of
    its points as a diameter or 3 on its circumference; so it is the smallest of those circles (every pair's
    diametral circle, every non-collinear triple's circumcircle by a linear solve) that holds every point."""
    pairs = np.array(list(itertools.combinations(range(len(xy)), 2)))
    cen = [(xy[pairs[:, 0]] + xy[pairs[:, 1]]) / 2]
    if len(xy) >= 3:
        tri = np.array(list(itertools.combinations(range(len(xy)), 3)))
        a, b, c = xy[tri[:, 0]], xy[tri[:, 1]], xy[tri[:, 2]]
        m = 2 * np.stack([b - a, c - a], 1)  # (t, 2, 2): |u - a|^2 = |u - b|^2 = |u - c|^2
        ok = np.abs(np.linalg.det(m)) > 1e-12
        rhs = np.stack([(b * b).sum(1) - (a * a).sum(1), (c * c).sum(1) - (a * a).sum(1)], 1)
        cen.append(np.linalg.solve(m[ok], rhs[ok][..., None])[..., 0])
        first = np.concatenate([pairs[:, 0], tri[ok, 0]])
    else:
        first = pairs[:, 0]
    cen = np.concatenate(cen)
    rad = np.linalg.norm(xy[first] - cen, axis=1)
    holds = np.all(np.linalg.norm(xy[None] - cen[:, None], axis=2) <= rad[:, None] * (1 + 1e-9) + 1e-12, axis=1)
    i = np.argmin(np.where(holds, rad, np.inf))
    return cen[i], rad[i]


def _sets(rng: np.random.Generator) -> list[np.ndarray]:
    """Point sets (T, N, 2) of several kinds: scattered, stretched, with duplicates, on a circle, on a line."""
    out = []
    for n in (3, 4, 7, 12, 24):
        out.append(rng.normal(size=(30, n, 2)) * rng.uniform(0.05, 3.0, (30, 1, 2)) + rng.uniform(-2, 2, (30, 1, 2)))
    dup = rng.normal(size=(20, 6, 2))
    out.append(np.concatenate([dup, dup[:, :3]], axis=1))  # every point twice or more
    a = np.arange(12) * 2 * np.pi / 12 + rng.uniform(0, 2 * np.pi, (20, 1))  # regular 12-gons: 12 co-circular points
    ring = np.stack([np.cos(a), np.sin(a)], -1) * rng.uniform(0.1, 2.0, (20, 1, 1))
    inner = rng.uniform(-0.3, 0.3, (20, 10, 2)) * np.abs(ring[:, :1, :1])
    out.append(np.concatenate([inner, ring], axis=1))
    t = rng.uniform(-1, 1, (20, 8, 1))
    out.append(t * rng.normal(size=(20, 1, 2)) + rng.normal(size=(20, 1, 2)))  # collinear points
    return out


def test_batched_circles_equal_the_definition_and_welzl():
    rng = np.random.default_rng(3)
    for xy in _sets(rng):
        c, r = min_enclosing_circles(xy)
        for i in range(len(xy)):
            cd, rd = _by_definition(xy[i])
            cw, rw = min_enclosing_circle(xy[i])
            scale = max(1.0, np.abs(xy[i]).max())
            # the circle is unique; which points define it, and so the rounding, may differ
            assert abs(r[i] - rd) <= 1e-12 * scale and abs(r[i] - rw) <= 1e-12 * scale
            np.testing.assert_allclose(c[i], cd, rtol=0, atol=1e-9 * scale)
            np.testing.assert_allclose(c[i], cw, rtol=0, atol=1e-12 * scale)
            assert np.all(np.linalg.norm(xy[i] - c[i], axis=1) <= r[i] * (1 + 1e-9) + 1e-12)


def test_batched_circles_fall_back_and_handle_small_sets(monkeypatch):
    """Sets still open at CIRCLES_MAX candidates (here 6, after one round) take Welzl's circle; one or two points."""
    rng = np.random.default_rng(5)
    xy = rng.normal(size=(25, 60, 2))
    ref = [min_enclosing_circle(p) for p in xy]
    monkeypatch.setattr(proposals, "CIRCLES_MAX", 6)
    c, r = min_enclosing_circles(xy)
    np.testing.assert_allclose(r, [x[1] for x in ref], rtol=0, atol=1e-12)
    np.testing.assert_allclose(c, [x[0] for x in ref], rtol=0, atol=1e-12)
    for n in (1, 2):
        p = rng.normal(size=(4, n, 2))
        c, r = min_enclosing_circles(p)
        np.testing.assert_allclose(c, p.mean(axis=1), atol=1e-15)
        np.testing.assert_allclose(r, np.linalg.norm(p[:, 0] - p[:, -1], axis=1) / 2, atol=1e-15)
    c, r = min_enclosing_circles(np.zeros((0, 5, 2)))
    assert c.shape == (0, 2) and r.shape == (0,)


@pytest.mark.parametrize("start", [3, 6, 10])
def test_batched_circles_do_not_depend_on_the_first_candidates(start, monkeypatch):
    """The first subset's size changes the rounds, not the circles (up to rounding)."""
    rng = np.random.default_rng(7)
    xy = rng.normal(size=(50, 30, 2))
    c0, r0 = min_enclosing_circles(xy)
    monkeypatch.setattr(proposals, "CIRCLES_START", start)
    c, r = min_enclosing_circles(xy)
    np.testing.assert_allclose(r, r0, rtol=0, atol=1e-14)
    np.testing.assert_allclose(c, c0, rtol=0, atol=1e-14)
