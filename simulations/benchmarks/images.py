"""Benchmark: images per second per core for CNN scoring and fine-tuning, peak memory.

Phantom images (:mod:`simulations.phantoms`, invented) are written as ``.npy`` files with
a manifest, then timed on one torch thread:

- evaluation: read + preprocess + score every image through the model bundle
  (``ModelBundle.predict`` on the manifest, the path ``sitepool site evaluate`` takes);
- the same images scored in a plain loop (already in memory, one forward per image);
- fine-tuning: full-batch Adam steps of the CNN on the preprocessed images, head only and
  every layer (the image rehearsal's plan), in images x steps per second.

Decoded images are cached by the site agent (:func:`site_agent.data.images.read_images`):
the first evaluation reads cold files; the round timings below all run warm.

Then, on the image rehearsal's four invented sites (:mod:`simulations.image_rehearsal`),
one evaluation round is timed three ways: scoring every site's images in a plain loop
(load the bundle, read the manifest, score); the whole site work without Flower (the
rounds benchmark's direct loop: score, evaluate, gate, ledger); and an evaluation round
through the in-process engine. The ratios are the costs of the study machinery.

Peak memory is the process's maximum resident set size (``resource.getrusage``).
Run with ``python -m simulations.benchmarks.images``.
"""

from __future__ import annotations

import argparse
import resource
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import torch

from simulations.phantoms import phantom_set
from site_agent.training.image_models import FineTuneLayers, ImagePreprocessing, build_cnn
from site_agent.training.model_bundle import (
    Architecture,
    BundleManifest,
    load_bundle,
    save_bundle,
    single_thread,
)


def main(argv: list[str] | None = None) -> None:
    """Print images/s for scoring and fine-tuning and the peak resident memory."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--images", type=int, default=400)
    parser.add_argument("--steps", type=int, default=20)
    args = parser.parse_args(argv)
    phantoms = phantom_set(args.images, seed=0)
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        paths = []
        for i, image in enumerate(phantoms.images):
            np.save(root / f"i{i}.npy", image)
            paths.append(str(root / f"i{i}.npy"))
        frame = pd.DataFrame({"image": paths})
        manifest = BundleManifest(
            name="bench-cnn",
            architecture=Architecture.CNN,
            image=ImagePreprocessing(size=32),
            cnn_channels=(8, 16, 32),
            fine_tune_layers=FineTuneLayers.HEAD,
        )
        torch.manual_seed(0)
        save_bundle(build_cnn((8, 16, 32)), manifest, root / "m.zip")
        bundle = load_bundle(root / "m.zip")

        start = time.perf_counter()
        bundle.predict(frame)
        evaluate_s = time.perf_counter() - start

        from site_agent.training.model_bundle import image_inputs

        x = image_inputs(frame, manifest)
        start = time.perf_counter()
        with single_thread(), torch.no_grad():
            for i in range(len(x)):
                bundle.model(x[i : i + 1])
        loop_s = time.perf_counter() - start

        y = torch.from_numpy(phantoms.labels.astype(np.float32))
        model = bundle.model
        model.train()
        start = time.perf_counter()
        with single_thread():
            params = [p for p in model.parameters() if p.requires_grad]
            optimizer = torch.optim.Adam(params, lr=0.01)
            for _ in range(args.steps):
                optimizer.zero_grad()
                loss = torch.nn.functional.binary_cross_entropy_with_logits(model(x), y)
                loss.backward()  # type: ignore[no-untyped-call]
                optimizer.step()
        tune_s = time.perf_counter() - start
        for p in model.parameters():
            p.requires_grad_(True)
        start = time.perf_counter()
        with single_thread():
            optimizer = torch.optim.Adam(model.parameters(), lr=0.003)
            for _ in range(args.steps):
                optimizer.zero_grad()
                loss = torch.nn.functional.binary_cross_entropy_with_logits(model(x), y)
                loss.backward()  # type: ignore[no-untyped-call]
                optimizer.step()
        tune_all_s = time.perf_counter() - start
        plain_s, direct_s, engine_s = _round_costs(root)
    peak_mib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    n = args.images
    print(f"images: {n} phantoms, 32x32 input, one torch thread (one core)")
    print(f"evaluation (read + preprocess + score): {n / evaluate_s:8.0f} images/s")
    print(f"scoring in a plain loop (in memory):    {n / loop_s:8.0f} images/s")
    print(f"fine-tuning, head only:                 {n * args.steps / tune_s:8.0f} image-steps/s")
    print(
        f"fine-tuning, every layer:               {n * args.steps / tune_all_s:8.0f} image-steps/s"
    )
    print(
        f"image evaluation round, 4 sites: plain scoring loop {plain_s:.2f} s, site work "
        f"without Flower {direct_s:.2f} s, in-process engine {engine_s:.2f} s "
        f"(engine / plain = {engine_s / plain_s:.1f})"
    )
    print(f"peak resident memory:                   {peak_mib:8.0f} MiB")


def _round_costs(root: Path) -> tuple[float, float, float]:
    """Time one image evaluation round as a plain loop, as direct site work, on the engine."""
    from coordinator.runs.engines import run_study
    from simulations.benchmarks.rounds import direct_round
    from simulations.image_rehearsal import default_image_scenario, prepare_image_study
    from site_agent.service import site_table

    study = prepare_image_study(default_image_scenario(), root / "study", adapt=False)
    raw = study.bundle_path.read_bytes()
    direct_round(study, raw)  # warm-up: imports and file cache
    start = time.perf_counter()
    for settings in study.settings:
        load_bundle(raw).predict(site_table(settings))
    plain_s = time.perf_counter() - start
    start = time.perf_counter()
    direct_round(study, raw)
    direct_s = time.perf_counter() - start
    start = time.perf_counter()
    run_study(
        study.protocol,
        study.bundle_path,
        study.settings,
        engine="inprocess",
        workdir=root / "run",
    )
    return plain_s, direct_s, time.perf_counter() - start


if __name__ == "__main__":
    main()
