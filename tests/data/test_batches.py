import torch

from adaptkit.data.batches import LoaderBatches, PairedBatches
from adaptkit.data.pair import TrainingData


def _data(ns=10, nt=4):
    return TrainingData(torch.arange(ns, dtype=torch.float32)[:, None], torch.arange(ns) % 2,
                        100 + torch.arange(nt, dtype=torch.float32)[:, None])


def test_each_pass_visits_every_sample_once_and_domains_cycle_independently():
    b = PairedBatches(_data(10, 4), batch_size=2, seed=0)
    src = torch.cat([b.next().x_src for _ in range(5)]).flatten().tolist()  # one source pass = 5 batches
    assert sorted(src) == list(range(10))
    b = PairedBatches(_data(10, 4), batch_size=2, seed=0)
    tgt = torch.cat([b.next().x_tgt for _ in range(6)]).flatten().tolist()  # 3 target passes meanwhile
    for k in range(3):
        assert sorted(tgt[4 * k:4 * k + 4]) == [100, 101, 102, 103]


def test_batch_larger_than_a_domain_wraps_around():
    b = PairedBatches(_data(3, 2), batch_size=7, seed=1).next()
    assert b.x_src.shape == (7, 1) and b.x_tgt.shape == (7, 1)
    assert set(b.x_tgt.flatten().tolist()) == {100, 101}
    assert torch.equal(b.y_src, (b.x_src.flatten().long() % 2))  # labels stay with their inputs


def test_state_dict_resumes_the_exact_stream():
    a = PairedBatches(_data(), batch_size=3, seed=5)
    for _ in range(4):
        a.next()
    state = a.state_dict()
    expected = [a.next() for _ in range(6)]
    b = PairedBatches(_data(), batch_size=3, seed=5)
    b.load_state_dict(state)
    got = [b.next() for _ in range(6)]
    assert all(torch.equal(e.x_src, g.x_src) and torch.equal(e.x_tgt, g.x_tgt) for e, g in zip(expected, got))


def test_loader_batches_cycle_and_drop_target_labels():
    from torch.utils.data import DataLoader, TensorDataset

    src = DataLoader(TensorDataset(torch.randn(5, 2), torch.arange(5) % 2), batch_size=2)
    tgt = DataLoader(TensorDataset(torch.randn(3, 2), torch.zeros(3, dtype=torch.long)), batch_size=2)
    lb = LoaderBatches(src, tgt)
    sizes = [(b.x_src.shape[0], b.x_tgt.shape[0]) for b in (lb.next() for _ in range(5))]
    assert sizes == [(2, 2), (2, 1), (1, 2), (2, 1), (2, 2)]
    assert not hasattr(lb.next(), "y_tgt")
