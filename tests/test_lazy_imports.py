"""What the quick paths import: `audiodsm --help`, and a render whose designs are remembered.

Behaviour tests (which modules end up loaded), not timings: a render must not pull in the
report and cluster stack (matplotlib, dask, Jinja2) nor librosa, and once its designs are in
the disk cache (audiodsm/disk_cache.py) it must not import scipy.signal or scipy.optimize at
all (about a second of CPU between them at import).
"""

import json
import os
import subprocess
import sys

import numpy as np
import soundfile as sf

HEAVY = ("matplotlib", "dask", "distributed", "jinja2", "librosa")
DESIGN_ONLY = ("scipy.signal", "scipy.optimize")


ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _loaded_after(code, env=None):
    """Run ``code`` in a fresh interpreter; the names of ``HEAVY + DESIGN_ONLY`` it loaded."""
    names = HEAVY + DESIGN_ONLY
    probe = (
        f"{code}\nimport json, sys\nprint(json.dumps([n for n in {names!r} if n in sys.modules]))"
    )
    done = subprocess.run(
        [sys.executable, "-c", probe],
        capture_output=True,
        text=True,
        env={**os.environ, **(env or {})},
        cwd=ROOT,
        check=True,
    )
    return json.loads(done.stdout.strip().splitlines()[-1])


def test_help_imports_no_command_stack():
    code = (
        "from audiodsm.cli import main\n"
        "try:\n    main(['--help'])\nexcept SystemExit:\n    pass\n"
        "import sys\n"
        "assert not any(m.startswith(('audiodsm.evaluate.', 'audiodsm.measure', 'audiodsm.stages'))"
        " for m in sys.modules if m != 'audiodsm.evaluate.tables'), sorted(sys.modules)\n"
        "assert 'numba' not in sys.modules and 'scipy' not in sys.modules"
    )
    assert _loaded_after(code) == []


def test_render_imports_no_report_stack_and_no_design_libraries_once_cached(tmp_path):
    rate = 48000
    t = np.arange(rate // 5) / rate
    tone = 0.25 * np.sin(2 * np.pi * 997.0 * t)
    sf.write(tmp_path / "in.wav", np.column_stack([tone, tone]), rate, subtype="PCM_24")
    code = (
        "from audiodsm.cli import main\n"
        "try:\n"
        f"    main(['render', 'profiles/dac_chip/pdm5_64x.toml', {str(tmp_path / 'in.wav')!r},"
        f" '--out-dir', {str(tmp_path / 'out')!r}, '--replace', '--no-progress'])\n"
        "except SystemExit as exc:\n"
        "    assert not exc.code, exc.code\n"
    )
    env = {"AUDIODSM_LOOP_CACHE": str(tmp_path / "cache")}
    # a first run designs the chain (scipy.signal and scipy.optimize at work) ...
    first = _loaded_after(code, env)
    assert not set(first) & set(HEAVY)
    assert "scipy.signal" in first
    # ... and the next one reads every design back: no design library imported
    assert _loaded_after(code, env) == []
    assert (tmp_path / "out").is_dir()
