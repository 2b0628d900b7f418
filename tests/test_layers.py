"""The package's layers hold (import-linter contracts in .importlinter) and no two modules import
each other, directly or through others, imports inside functions included (grimp, the import
graph library behind import-linter). Common practice for keeping an architecture as written."""

import pytest

grimp = pytest.importorskip("grimp")


def test_no_import_cycles_between_modules():
    graph = grimp.build_graph("dihedra")
    cycles = []
    for module in sorted(graph.modules):
        if module == "dihedra":   # the package root gathers the public API from every layer
            continue
        for imported in graph.find_modules_directly_imported_by(module):
            if imported != "dihedra" and graph.chain_exists(importer=imported, imported=module):
                cycles.append(f"{module} <-> {imported}")
    assert not cycles, cycles


def test_import_contracts_are_kept():
    import os

    from importlinter.cli import lint_imports

    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    assert lint_imports(config_filename=os.path.join(root, ".importlinter"), no_cache=True) == 0
