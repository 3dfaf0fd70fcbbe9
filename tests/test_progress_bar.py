"""The optional progress bar hook (psiloom.loop.ProgressBar): off when the output is not a
terminal, and showing the energy in parenthesis notation and the acceptance when it is."""

import io
from types import SimpleNamespace

import pytest

pytest.importorskip("tqdm")

from psiloom.history import History  # noqa: E402
from psiloom.loop import ProgressBar, Visit, format_bar_postfix  # noqa: E402


class _Terminal(io.StringIO):
    def isatty(self):
        return True


def _visit(step, n_steps, energy, error, acceptance):
    history = History()
    history.append_row({"step": step, "energy": energy, "error": error, "variance": 0.1, "tau": 1.0,
                        "rhat": 1.0, "acceptance": acceptance, "grad_norm": 0.0, "seconds": 0.01})
    return Visit(SimpleNamespace(step=step), step, n_steps, [], history)


def _run(bar, visits, n_steps):
    bar.start(SimpleNamespace(step=0), n_steps)
    try:
        for v in visits:
            bar.after(v)
    finally:
        bar.close()


def test_bar_is_off_and_silent_when_not_a_terminal():
    out = io.StringIO()  # a log file, a pipe in CI: isatty() is False
    bar = ProgressBar(file=out)
    assert not bar.enabled
    _run(bar, [_visit(5, 10, -7.14235, 0.00034, 0.5)], 10)
    assert out.getvalue() == ""


def test_bar_shows_energy_in_parenthesis_notation_and_acceptance_on_a_terminal():
    out = _Terminal()
    bar = ProgressBar(file=out)
    assert bar.enabled
    _run(bar, [_visit(5, 10, -7.1, 0.2, 0.61), _visit(10, 10, -7.14235, 0.00034, 0.523)], 10)
    text = out.getvalue()
    # 1.23456 ± 0.00034 → 1.23456(34): the error's two significant digits (CODATA's notation)
    assert "E = -7.14235(34)" in text
    assert "acc 0.523" in text
    assert "10/10" in text


def test_postfix_rounds_like_the_estimate_printout():
    assert format_bar_postfix({"energy": 1.23456, "error": 0.00034, "acceptance": 0.25}) == "E = 1.23456(34)  acc 0.250"


def test_default_output_that_is_not_a_terminal_turns_the_bar_off(monkeypatch):
    # outside a notebook kernel, tqdm's auto mode is the text bar; a redirected stderr (a log
    # file, CI) is no terminal, so the bar stays off and GroundStateSearch prints lines instead
    monkeypatch.setattr("sys.stderr", io.StringIO())
    assert not ProgressBar().enabled
