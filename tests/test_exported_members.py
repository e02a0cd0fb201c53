"""The public API: everything in __all__ exists, and __all__ is sorted."""

import loadrun
import mock_server


def test_all_is_sorted_and_importable() -> None:
    for module in (loadrun, mock_server):
        assert list(module.__all__) == sorted(module.__all__), module.__name__
        for name in module.__all__:
            assert hasattr(module, name), f"{module.__name__}.{name}"
