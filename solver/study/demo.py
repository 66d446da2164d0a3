"""`eddybox demo`: the built-in cloud-box scenario, run end to end, then its report."""
from __future__ import annotations

import os
from importlib import resources

from eddybox.solver.run import config as cfgmod
from eddybox.solver.run.simulation import Simulation


def demo_config(out):
    text = resources.files("eddybox.solver.study").joinpath("demo.yaml").read_text()
    import yaml

    raw = yaml.safe_load(text)
    raw["output"] = str(out)
    return cfgmod.validate(raw, "eddybox demo")


def run_demo(out="runs/demo", overwrite=False, comm=None) -> int:
    cfg = demo_config(out)
    sim = Simulation(cfg, output=out, overwrite=overwrite, comm=comm)
    code = sim.run()
    if code != 0 or not sim.is_root:
        return code
    try:
        from eddybox.solver.study.report import write_report
    except ImportError:  # the report needs matplotlib (extra 'plot')
        print("demo finished; install the 'plot' extra for its report")
        return code
    report_dir = os.path.join(out, "report")
    write_report([out], report_dir)
    print(f"demo finished: outputs in {out}, report in {report_dir}/index.html")
    return code
