"""The curated public API: every name resolves and is documented."""

import importlib
import inspect
import pkgutil

import pytest

import ibprep


@pytest.mark.parametrize("name", ibprep.__all__)
def test_public_name_resolves_and_has_docstring(name):
    obj = getattr(ibprep, name)
    doc = inspect.getdoc(obj)
    assert doc and len(doc) > 10, f"ibprep.{name} needs a docstring"


def _modules():
    for info in pkgutil.walk_packages(ibprep.__path__, prefix="ibprep."):
        if info.name.endswith("__main__"):
            continue
        yield info.name


@pytest.mark.parametrize("modname", sorted(_modules()))
def test_every_module_declares_all_and_its_names_exist(modname):
    mod = importlib.import_module(modname)
    assert mod.__doc__, f"{modname} needs a module docstring"
    assert hasattr(mod, "__all__"), f"{modname} needs __all__"
    for name in mod.__all__:
        assert hasattr(mod, name), f"{modname}.__all__ lists {name!r}, which does not exist"


def test_error_tree():
    assert issubclass(ibprep.InputError, ibprep.IbprepError)
    assert issubclass(ibprep.InputError, ValueError)
    assert issubclass(ibprep.MissingDependencyError, ImportError)


def test_cell_tag_codes_are_the_contract():
    assert int(ibprep.CellTag.FLUID) == 0
    assert int(ibprep.CellTag.SOLID) == 1
    assert int(ibprep.CellTag.INTERFACE) == 2
