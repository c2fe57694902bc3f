"""Benchmark: images per second per core for CNN scoring and fine-tuning, peak memory.

Phantom images (:mod:`simulations.phantoms`, invented) are written as ``.npy`` files with
a manifest, then timed on one torch thread:

- evaluation: read + preprocess + score every image through the model bundle
  (``ModelBundle.predict`` on the manifest, the path ``sitepool site evaluate`` takes);
- the same images scored in a plain loop (already in memory, one forward per image);
- fine-tuning: full-batch Adam steps of the head-only CNN on the preprocessed images
  (images x steps per second).

Peak memory is the process's maximum resident set size (``resource.getrusage``).
Run with ``python -m simulations.benchmarks.images``. Not yet measured: the cost of an
image evaluation round through the Flower engine against this loop (no image rehearsal
command exists yet).
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
    peak_mib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    n = args.images
    print(f"images: {n} phantoms, 32x32 input, one torch thread (one core)")
    print(f"evaluation (read + preprocess + score): {n / evaluate_s:8.0f} images/s")
    print(f"scoring in a plain loop (in memory):    {n / loop_s:8.0f} images/s")
    print(f"fine-tuning, head only:                 {n * args.steps / tune_s:8.0f} image-steps/s")
    print(f"peak resident memory:                   {peak_mib:8.0f} MiB")


if __name__ == "__main__":
    main()
