"""napari sample data: the bundled demo stacks."""

from __future__ import annotations

from ..model import demo_stack_path
from ._reader import read_stack_file


def spiral_demo() -> list[tuple]:
    """The spiral demo stack (3D + time, one reporter channel)."""
    return read_stack_file(demo_stack_path("spiral"))


def distichous_demo() -> list[tuple]:
    """The distichous demo stack."""
    return read_stack_file(demo_stack_path("distichous"))
