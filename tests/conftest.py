"""Tests restore the world: every test must leave no hook, no torch function mode and no changed setting."""

from __future__ import annotations

import gc

import pytest
import torch
from torch import nn


def _our_hooks() -> list[str]:
    """Hooks installed by attnscope's capture that are still attached to any live module."""
    found = []
    for obj in gc.get_objects():
        if issubclass(type(obj), nn.Module):  # type(): never triggers a proxy's __class__
            for attr in ("_forward_hooks", "_forward_pre_hooks"):
                for fn in getattr(obj, attr, {}).values():
                    if "attnscope" in getattr(fn, "__module__", "") or "attnscope" in getattr(fn, "__qualname__", ""):
                        found.append(f"{type(obj).__name__}.{attr}: {fn.__qualname__}")
    return found


@pytest.fixture(autouse=True)
def world_restored():
    fastpath = torch.backends.mha.get_fastpath_enabled()
    grad = torch.is_grad_enabled()
    yield
    from attnscope.capture import session

    problems = []
    if torch._C._len_torch_function_stack() != 0:
        problems.append(f"{torch._C._len_torch_function_stack()} torch function mode(s) left on the stack")
    if torch.backends.mha.get_fastpath_enabled() != fastpath:
        problems.append("torch.backends.mha fast-path switch not restored")
    if torch.is_grad_enabled() != grad:
        problems.append("grad mode not restored")
    if session._active:
        problems.append(f"captures still registered as open: {session._active}")
    from attnscope.capture.paths import flex

    if flex._held or flex._recorders:
        problems.append(f"FlexAttention wrapper still held in {len(flex._held)} place(s)")
    leftover = _our_hooks()
    if leftover:
        problems.append("hooks left on modules: " + "; ".join(leftover[:5]))
    if problems:
        pytest.fail("test left the world changed: " + " | ".join(problems))


@pytest.fixture
def seeded():
    torch.manual_seed(0)
    yield
