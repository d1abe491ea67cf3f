"""Every mode option of the public API (a keyword annotated with a `Literal`) is checked the same
way, before any work: `check_choice`'s ValueError "`name`=value is not known: use one of ...",
listing exactly the choices the annotation names."""

from __future__ import annotations

import inspect
import re
import typing

import numpy as np
import pytest

import ntkcalc
from ntkcalc._engine.options import check_choice

BAD = "bogus"

# Literal options whose check lives in a file another branch owns; they move to `check_choice`
# there. Remove an entry when its check does, never add one.
ELSEWHERE = {
}


def _net():
    return ntkcalc.Net(lambda p, x: x @ p, np.ones((3, 2)))


X = np.ones((4, 3))
Y = np.zeros((4, 2))

# (public name, option): a call that passes `option`=BAD and otherwise valid arguments.
CALLS = {
    ("ntk", "method"): lambda bad: ntkcalc.ntk(_net(), X, method=bad),
    ("ntk", "outputs"): lambda bad: ntkcalc.ntk(_net(), X, outputs=bad),
    ("ntk", "dtype"): lambda bad: ntkcalc.ntk(_net(), X, dtype=bad),
    ("ntk_by_layer", "method"): lambda bad: ntkcalc.ntk_by_layer(_net(), X, method=bad),
    ("ntk_by_layer", "outputs"): lambda bad: ntkcalc.ntk_by_layer(_net(), X, outputs=bad),
    ("ntk_by_layer", "dtype"): lambda bad: ntkcalc.ntk_by_layer(_net(), X, dtype=bad),
    ("drift", "outputs"): lambda bad: ntkcalc.drift([_net(), _net()], X, Y, outputs=bad),
    ("drift", "method"): lambda bad: ntkcalc.drift([_net(), _net()], X, Y, method=bad),
    ("forecast", "loss"): lambda bad: ntkcalc.forecast(np.eye(4), Y, Y, lr=0.1, steps=1,
                                                       loss=bad),
    ("feature_rank", "ntk_gram"): lambda bad: ntkcalc.feature_rank(_net(), X, ntk_gram=bad),
    ("feature_rank", "dtype"): lambda bad: ntkcalc.feature_rank(_net(), X, dtype=bad),
    ("feature_rank_over_inits", "ntk_gram"): lambda bad: ntkcalc.feature_rank_over_inits(
        lambda key: _net(), X, ntk_gram=bad),
    ("feature_rank_over_inits", "dtype"): lambda bad: ntkcalc.feature_rank_over_inits(
        lambda key: _net(), X, dtype=bad),
    ("ntk_features", "outputs"): lambda bad: ntkcalc.ntk_features(_net(), X, k=4, outputs=bad),
    ("ntk_features", "method"): lambda bad: ntkcalc.ntk_features(_net(), X, k=4, method=bad),
    ("KernelArray", "kind"): lambda bad: ntkcalc.KernelArray(np.eye(2), kind=bad, num_outputs=1),
    ("laziness", "kind"): lambda bad: ntkcalc.laziness(distance=0.1, kind=bad),
    ("ntk_operator", "outputs"): lambda bad: ntkcalc.ntk_operator(_net(), X, outputs=bad),
    ("ntk_operator", "method"): lambda bad: ntkcalc.ntk_operator(_net(), X, method=bad),
    ("ntk_operator", "dtype"): lambda bad: ntkcalc.ntk_operator(_net(), X, dtype=bad),
    ("analyse_run", "loss"): lambda bad: ntkcalc.analyse_run("never-read", X, Y, loss=bad),
    ("analyse_run", "kernel"): lambda bad: ntkcalc.analyse_run("never-read", X, Y, kernel=bad),
    ("plan_features", "outputs"): lambda bad: ntkcalc.plan_features(_net(), X, k=4, outputs=bad),
    ("plan_features", "method"): lambda bad: ntkcalc.plan_features(_net(), X, k=4, method=bad),
    ("run_demo", "scale"): lambda bad: ntkcalc.run_demo("never-written", scale=bad),
}


def _literal(annotation) -> tuple[str, ...] | None:
    """The choices of a `Literal` annotation, also inside ``X | None``."""
    if typing.get_origin(annotation) is typing.Literal:
        return typing.get_args(annotation)
    for arg in typing.get_args(annotation):
        if typing.get_origin(arg) is typing.Literal:
            return typing.get_args(arg)
    return None


def _entry_points():
    """(public name, function) for each public function and class constructor; the frozen
    result dataclasses are built by the library, not the caller, and are left out."""
    for name in dir(ntkcalc):
        obj = getattr(ntkcalc, name)
        if inspect.isfunction(obj):
            yield name, obj
        elif inspect.isclass(obj) and "__new__" in vars(obj):
            yield name, obj.__new__


def literal_options() -> dict[tuple[str, str], tuple[str, ...]]:
    found = {}
    for name, function in _entry_points():
        for option, annotation in typing.get_type_hints(function).items():
            choices = _literal(annotation)
            if choices is not None:
                found[(name, option)] = choices
    return found


def test_every_literal_option_is_checked_here():
    found = literal_options()
    assert ("ntk", "outputs") in found and ("KernelArray", "kind") in found  # the finder works
    assert set(found) == set(CALLS) | set(ELSEWHERE)


@pytest.mark.parametrize("name, option", sorted(CALLS))
def test_unknown_choice_is_refused_up_front(name, option):
    choices = literal_options()[(name, option)]
    message = f"`{option}`={BAD!r} is not known: use one of {', '.join(map(repr, choices))}."
    with pytest.raises(ValueError, match=f"^{re.escape(message)}$"):
        CALLS[(name, option)](BAD)


def test_check_choice():
    assert check_choice("mode", "a", ("a", "b")) == "a"
    for bad in ("c", None, 1, ("a",)):
        with pytest.raises(ValueError, match=r"^`mode`=.* is not known: use one of 'a', 'b'\.$"):
            check_choice("mode", bad, ("a", "b"))
