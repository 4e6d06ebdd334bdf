"""Where the model layer comes from: the repository's ``models/`` folder, as ``workbench.models``.

The model layer lives in the repository's top-level ``models/`` folder (it never imports
``workbench``). It is installed *inside* the package, as ``workbench/models/`` in the wheel,
so that no global top-level ``models`` package exists to collide with a user's own
``models.py`` or ``models/`` beside a notebook. In a source checkout or an editable install
there is no ``workbench/models/`` folder: the checkout's ``models/`` is then loaded under the
same name, ``workbench.models``, from its file path (never through ``sys.path``, so a
``models.py`` in the working directory cannot take its place).
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

NAME = "workbench.models"


def load_model_layer() -> None:
    """Make ``workbench.models`` importable; a no-op in an installed wheel."""
    here = Path(__file__).resolve().parent
    if NAME in sys.modules or (here / "models" / "__init__.py").exists():
        return
    root = here.parent / "models"
    init = root / "__init__.py"
    if not init.exists():
        raise ImportError(f"the model layer is missing: neither {here / 'models'} nor {root}")
    spec = importlib.util.spec_from_file_location(
        NAME, init, submodule_search_locations=[str(root)]
    )
    module = importlib.util.module_from_spec(spec)
    sys.modules[NAME] = module
    try:
        spec.loader.exec_module(module)
    except BaseException:
        del sys.modules[NAME]
        raise
    sys.modules["workbench"].models = module  # as the import system does for a subpackage
