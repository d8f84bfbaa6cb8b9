"""Rule dispatch: named inputs, outputs and params reach the adapter as keywords."""

import sys
import types

import pytest

from pipeline.workflow import dispatch as workflow


@pytest.fixture
def fake_step(monkeypatch):
    calls = []
    module = types.ModuleType("fake_step_module")

    def adapter(*, frames, master, sigma):
        calls.append((frames, master, sigma))
        if sigma < 0:
            raise ValueError("sigma must be positive")

    module.adapter = adapter
    monkeypatch.setitem(sys.modules, "fake_step_module", module)
    monkeypatch.setitem(workflow.STEPS, "fake_rule", ("fake_step_module", "adapter"))
    return calls


def test_adapter_gets_named_inputs_outputs_and_params(fake_step, tmp_path):
    log = tmp_path / "fake.log"
    workflow.run_rule("fake_rule", {"frames": ["a.fits", "b.fits"]}, {"master": "m.fits"},
                      {"sigma": 3.0}, str(log))
    assert fake_step == [(["a.fits", "b.fits"], "m.fits", 3.0)]
    assert "rule fake_rule done" in log.read_text()


def test_failure_is_logged_with_traceback_and_raised(fake_step, tmp_path):
    log = tmp_path / "fake.log"
    with pytest.raises(ValueError, match="sigma must be positive"):
        workflow.run_rule("fake_rule", {"frames": []}, {"master": "m.fits"}, {"sigma": -1.0},
                          str(log))
    text = log.read_text()
    assert "rule fake_rule failed" in text and "Traceback" in text


def test_every_registered_adapter_exists():
    import importlib

    for rule, (module, func) in workflow.STEPS.items():
        assert callable(getattr(importlib.import_module(module), func)), rule
