"""Build step: ship the repository's notebooks/ inside the wheel as ``gapbook/notebooks``.

The notebooks stay in one place in the repository (``notebooks/``, where users and
JupyterLab find them); a non-editable install still needs them, so the wheel carries a
copy made at build time. Editable installs read ``notebooks/`` in place.
"""
from pathlib import Path

from setuptools import setup
from setuptools.command.build_py import build_py

HERE = Path(__file__).resolve().parent


class BuildWithNotebooks(build_py):
    def run(self):
        super().run()
        if getattr(self, "editable_mode", False):
            return
        target = Path(self.build_lib) / "gapbook" / "notebooks"
        target.mkdir(parents=True, exist_ok=True)
        for notebook in sorted((HERE / "notebooks").glob("*.ipynb")):
            self.copy_file(str(notebook), str(target / notebook.name))


setup(cmdclass={"build_py": BuildWithNotebooks})
