"""Robustness sweep: random polymer recordings (λ 0.5 ms–0.5 s, random optics, geometry, orientation,
format) rendered by thinning.synth and analysed end to end; prints λ error, regime and quality per case.

    python scripts/robustness_sweep.py SEED N
"""
import pathlib
import sys
import tempfile

import numpy as np

from thinning import synth, laws
from thinning.analysis import analyse_to
from thinning.units import AnalysisOptions
rng=np.random.default_rng(int(sys.argv[1]) if len(sys.argv)>1 else 0)

for k in range(int(sys.argv[2]) if len(sys.argv)>2 else 6):
    lam=10**rng.uniform(np.log10(5e-4), np.log10(0.5))
    geo=rng.choice(["plates","dripping"])
    eta_s=10**rng.uniform(-3,-1.3)
    g=10**rng.uniform(0,1)
    l2=float(10**rng.uniform(4,5))
    sigma=rng.uniform(0.03,0.07)
    plate=3e-3 if geo=="plates" else 1.2e-3
    px=plate/rng.uniform(110,170)
    d0=plate*rng.uniform(0.25,0.4)
    # frame rate: ~ 25-60 frames per lambda... choose fps so 3λ spans 30-80 frames
    fps=float(np.clip(rng.uniform(10,30)/lam, 20, 50000))
    fluid=laws.Fluid(surface_tension=sigma, solvent_viscosity=eta_s, density=1000.0, polymer_modulus=g, relaxation_time=lam, extensibility=l2)
    scene=synth.Scene(fluid=fluid, geometry=geo, plate_diameter_m=plate, initial_diameter_m=d0, pixel_size_m=px, fps_hz=fps,
                      frame_size_px=(int(plate/px*1.5), int(plate/px)+30), stretch_duration_s=0.0)
    optics=synth.Optics(blur_sigma_px=float(rng.uniform(0.5,2)), blur_kind=str(rng.choice(["gaussian","disk"])),
                        tilt_deg=float(rng.uniform(-3,3)), orientation=str(rng.choice(["vertical","horizontal"])),
                        uneven_light=float(rng.uniform(0,0.3)), read_noise=float(rng.uniform(0.002,0.01)))
    fmt=str(rng.choice(["avi-mjpg","avi-raw","tiff"]))
    d=pathlib.Path(tempfile.mkdtemp()); path=d/("rec.tif" if fmt=="tiff" else "rec.avi")
    try:
        truth=synth.write_recording(scene, optics, path, fmt=fmt, seed=k)
    except Exception as e:
        print(k, 'synth failed', e); continue
    opts=AnalysisOptions(fps_hz=fps, pixel_size_m=px, surface_tension_N_m=sigma, geometry=geo)
    try:
        r=analyse_to(path, d/"out", opts).to_json()
    except Exception as e:
        print(k, 'ANALYSE FAILED', type(e).__name__, e, geo, fmt, optics.orientation); continue
    lamm=r['relaxation_time_s']
    err=None if lamm is None else lamm/lam-1
    print(f"{k} {geo:8s} {optics.orientation:10s} {fmt:8s} lam={lam:.3g} fps={fps:.3g} n={truth.n_frames} -> {r['regime']} err={'NONE' if err is None else f'{err*100:+.1f}%'} q={r['quality']} {r['quality_reasons'][:1]}", flush=True)
