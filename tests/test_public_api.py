"""The package root's public names: each one loads, and the README's library example runs."""

import numpy as np

import fecproxy


def test_every_public_name_loads():
    for name in fecproxy.__all__:
        assert getattr(fecproxy, name) is not None


def test_readme_library_example():
    # Design-notes vector, computed with `galois` from RFC 5510 §8.2 (k=4, n=7).
    code = fecproxy.BlockCode(k=4, n=7)
    source = np.arange(1, 17, dtype=np.uint8).reshape(4, 4)
    repair = code.encode(source)
    assert bytes(repair.reshape(-1)).hex() == "1516177f424140d8484b4aaf"
    rebuilt = code.decode({1: source[1], 4: repair[0], 5: repair[1], 6: repair[2]})
    assert (rebuilt == source).all()
