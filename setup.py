"""Packaging hook: the jinja2 templates live at the top level (templates/) and are copied into the installed
package as derive/templates, so a plain `pip install .` carries them (metadata is in pyproject.toml)."""
import shutil
from pathlib import Path

from setuptools import setup
from setuptools.command.build_py import build_py


class BuildWithTemplates(build_py):
    def run(self):
        super().run()
        src = Path(__file__).resolve().parent / "templates"
        shutil.copytree(src, Path(self.build_lib) / "derive" / "templates", dirs_exist_ok=True)


setup(cmdclass={"build_py": BuildWithTemplates})
