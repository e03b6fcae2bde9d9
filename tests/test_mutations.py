"""The decisions the suite guards: every one-line break listed in tests/mutations.py must make at least one of
its default-suite tests fail, and the unbroken copy must pass them all (common practice: mutation testing).
Slow (about a minute per mutation on one core): run with `python -m pytest -m slow tests/test_mutations.py`."""
import pytest

import mutations


@pytest.mark.slow
def test_every_mutation_is_caught_by_a_default_test(capsys):
    code = mutations.main([])
    out = capsys.readouterr().out
    print(out)
    assert code == 0, out
