"""Regenerate the bundled demo recordings in sample_videos/ (deterministic).

    python scripts/make_sample_videos.py [FOLDER]

The scenario (an invented water-based ink in eight lots) is defined in
thinning/demo.py; the recordings are rendered by thinning.synth.
"""

import shutil
import sys
from pathlib import Path

from thinning.demo import write_sample_videos

if __name__ == "__main__":
    folder = Path(sys.argv[1] if len(sys.argv) > 1 else Path(__file__).resolve().parent.parent / "sample_videos")
    if folder.exists():
        shutil.rmtree(folder)
    write_sample_videos(folder)
    size = sum(p.stat().st_size for p in folder.rglob("*") if p.is_file())
    print(f"wrote {folder} ({size / 1e6:.1f} MB)")
