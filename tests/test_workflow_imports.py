"""What a job process imports before it does any work (the per-job fixed cost, docs/speed.md).

Each job script runs in a fresh Python process, so every module its job
imports at module level is paid once per job: scikit-learn ~1 s of CPU,
scipy.stats ~0.5 s, matplotlib ~0.3 s (measured with ``python -X importtime``
on this machine; the numbers are not asserted, only which modules load). Jobs
import those where they are used, so a job that never calls them does not
pay. Each check runs in a subprocess: the test process has imported
everything already.
"""

import os
import subprocess
import sys

import pytest

WORKFLOW = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "workflow")

# job module -> heavy modules it must not import at module level
NOT_AT_IMPORT = {
    "decode": ["sklearn", "scipy.stats", "matplotlib"],  # the SVM and logistic regression import scikit-learn when called
    "glm": ["sklearn", "scipy.stats", "scipy.signal", "matplotlib"],
    "brain_mask": ["sklearn", "scipy.stats", "matplotlib"],
    "group": ["sklearn", "scipy.stats", "matplotlib"],
    "geometry_patterns": ["sklearn", "scipy.stats", "matplotlib"],
    "geometry_subject": ["sklearn", "scipy.stats", "matplotlib"],  # Spearman and the noise ceiling import rankdata when called
    "geometry_searchlight": ["sklearn", "scipy.stats", "matplotlib"],
    "searchlight_block": ["sklearn", "scipy.stats", "matplotlib"],
    "searchlight_merge": ["sklearn", "scipy.stats", "matplotlib"],
}


@pytest.mark.parametrize("job", sorted(NOT_AT_IMPORT))
def test_a_job_module_imports_no_heavy_library_it_may_not_use(job):
    code = (f"import sys; import foldwise.jobs.{job}, foldwise.provenance.memo; "
            f"print(' '.join(name for name in {NOT_AT_IMPORT[job]!r} if name in sys.modules))")
    environment = dict(os.environ, PYTHONPATH=WORKFLOW)
    completed = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=environment, timeout=120)
    assert completed.returncode == 0, completed.stderr
    assert completed.stdout.strip() == "", f"foldwise.jobs.{job} imports {completed.stdout.strip()} at module level"
