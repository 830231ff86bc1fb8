"""Write the lock files: every direct and indirect dependency of patchwood at an exact version.

Run it with ``make lock``. It installs patchwood with the newest releases that pyproject.toml's
ranges allow into a throw-away virtual environment, then records what pip installed:

- ``requirements/runtime.lock``: what ``make demo`` installs (the package's dependencies);
- ``requirements/test.lock``: the test extra on top (``-r runtime.lock`` plus the rest), what
  ``make test`` installs.

Both also pin pip, setuptools and wheel, so that the editable install of patchwood itself is built
with known versions (``--no-build-isolation``). Run the suite against the new lock (``make test``
after ``make clean``) before committing it; ``make test-newest`` runs the suite against whatever is
newest today without touching the lock.
"""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
import venv
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
TOOLS = ("pip", "setuptools", "wheel")


def freeze(python: Path) -> dict[str, str]:
    """``pip freeze --all`` as {lower-case name: line}, without patchwood itself."""
    text = subprocess.run([str(python), "-m", "pip", "freeze", "--all"], check=True,
                          capture_output=True, text=True).stdout
    lines = {}
    for line in text.splitlines():
        name = line.split("==")[0].strip().lower().replace("_", "-")
        if "==" in line and name != "patchwood":
            lines[name] = line.strip()
    return lines


def write(path: Path, header: str, lines: list[str]) -> None:
    tmp = path.with_name(f".{path.name}.part")
    tmp.write_text(header + "".join(f"{line}\n" for line in lines), encoding="utf-8")
    os.replace(tmp, path)


def main() -> int:
    with tempfile.TemporaryDirectory(prefix="patchwood-lock-") as tmp:
        env = Path(tmp) / "venv"
        venv.create(env, with_pip=True)
        python = env / "bin" / "python"
        pip = [str(python), "-m", "pip", "install", "--quiet", "--upgrade"]
        subprocess.run([*pip, *TOOLS], check=True)
        subprocess.run([*pip, str(ROOT)], check=True)
        runtime = freeze(python)
        subprocess.run([*pip, f"{ROOT}[test]"], check=True)
        everything = freeze(python)
    made = (f"# made by `make lock` (requirements/lock.py) with Python "
            f"{sys.version_info.major}.{sys.version_info.minor} on {sys.platform}\n")
    write(HERE / "runtime.lock", made + "# what `make demo` installs\n", sorted(runtime.values()))
    extra = sorted(line for name, line in everything.items() if name not in runtime)
    changed = sorted(name for name in runtime if everything[name] != runtime[name])
    if changed:
        print(f"error: the test extra changes runtime pins: {', '.join(changed)}", file=sys.stderr)
        return 1
    write(HERE / "test.lock", made + "# what `make test` installs\n-r runtime.lock\n", extra)
    print(f"wrote {HERE / 'runtime.lock'} ({len(runtime)} packages) and "
          f"{HERE / 'test.lock'} ({len(extra)} more)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
