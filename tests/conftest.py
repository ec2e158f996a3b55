"""Every run folder the suite writes has its plan.json validated against docs/plan.schema.json.

The hook wraps the run-folder writer's inner step (``optimizer.export.run._write_contents``), so a
plan.json that breaks the schema fails whichever test wrote it, before the folder is moved into
place.
"""

from __future__ import annotations

import json
import os

import pytest

# The suite solves many NLP structures once each: compiling each (minutes of a core on this size of
# machine) would not pay, and detached compilers would outlive the run.  tests/test_compiled.py
# checks the compiled route itself; set SLINGBACK_COMPILE=auto to run the suite with it.
os.environ.setdefault("SLINGBACK_COMPILE", "off")


@pytest.fixture(autouse=True, scope="session")
def _plan_json_fits_the_schema():
    from plan_schema import validator
    import optimizer.export.run as run

    write = run._write_contents

    def checked(plan, problem, folder, *args, **kwargs):
        write(plan, problem, folder, *args, **kwargs)
        data = json.loads((folder / "plan.json").read_text(encoding="utf-8"))
        errors = [f"{e.json_path}: {e.message[:200]}" for e in validator().iter_errors(data)]
        assert not errors, f"plan.json of {plan.name} breaks docs/plan.schema.json: {errors[:5]}"

    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(run, "_write_contents", checked)
        yield
