"""Shared fixtures. Data here is made by the tests themselves (scikit-learn generators and bundled datasets)."""
import numpy as np
import pytest
import torch

torch.set_num_threads(1)


def moons_pair(angle_deg: float = 30.0, n: int = 300, seed: int = 0, **kw):
    """Two moons (sklearn.datasets.make_moons) against a rotated copy: the toy of Ganin et al., JMLR 2016, §5.1.1."""
    from sklearn.datasets import make_moons

    from adaptkit import DomainPair

    xs, ys = make_moons(n, noise=0.1, random_state=seed)
    xt, yt = make_moons(n, noise=0.1, random_state=seed + 1000)
    th = np.radians(angle_deg)
    rot = np.array([[np.cos(th), -np.sin(th)], [np.sin(th), np.cos(th)]])
    centre = xs.mean(0)
    xt = (xt - centre) @ rot.T + centre
    return DomainPair(xs, ys, xt, yt, name="moons", **kw)


@pytest.fixture
def small_pair():
    return moons_pair(n=120)
