"""Writes the committed inputs of the reference checks, tests/reference/inputs/.

Usage: python tests/reference/make_inputs.py   (from the repository root)

Every case has 4 samples drawn with numpy's default_rng and a fixed seed, so
the files are reproducible with the pinned numpy. Token ids stay below the
vocabulary of each text model (rows of its embedding table, the Gather data).
"""

import os

import numpy as np

OUT = os.path.join("tests", "reference", "inputs")
SAMPLES = 4


def images(seed, channels, size=32):
    rng = np.random.default_rng(seed)
    return rng.standard_normal((SAMPLES, channels, size, size)).astype(np.float32)


def main():
    os.makedirs(OUT, exist_ok=True)
    np.save(os.path.join(OUT, "resnet18_b.npy"), images(1, 3))
    np.save(os.path.join(OUT, "preact_resnet14.npy"), images(2, 3))
    np.save(os.path.join(OUT, "mobilenet_v2.npy"), images(3, 3))
    np.save(os.path.join(OUT, "tile_grader.npy"), images(4, 1))
    np.save(os.path.join(OUT, "resnet_cifar_folded.npy"), images(5, 3))
    # fixtures/structure/ (issue 15); resnet18_constant_weights reuses resnet18_b's.
    np.save(os.path.join(OUT, "detector_box_decode.npy"), images(8, 3))
    np.save(os.path.join(OUT, "cait_class_attention.npy"), images(9, 3, 16))
    np.save(os.path.join(OUT, "poolformer_s12_like.npy"), images(10, 3))
    np.save(os.path.join(OUT, "nf_scaled_preact.npy"), images(11, 3, 16))
    np.save(os.path.join(OUT, "convmixer_like.npy"), images(12, 3, 16))
    np.save(os.path.join(OUT, "swin_like.npy"), images(14, 3))
    # fixtures/structure/streaming_state.onnx: input [N, 64], state [2, N, 16]
    # (samples on axis 1), sr a 0-d int64 sample rate.
    rng = np.random.default_rng(13)
    np.savez(
        os.path.join(OUT, "streaming_state.npz"),
        input=rng.standard_normal((SAMPLES, 64)).astype(np.float32),
        state=rng.standard_normal((2, SAMPLES, 16)).astype(np.float32),
        sr=np.array(16000, dtype=np.int64),
    )
    # fixtures/structure/if_sample_rate.onnx: input [N, 64], sr a 0-d int64
    # that takes the If's then_branch (sr == 16000).
    rng = np.random.default_rng(15)
    np.savez(
        os.path.join(OUT, "if_sample_rate.npz"),
        input=rng.standard_normal((SAMPLES, 64)).astype(np.float32),
        sr=np.array(16000, dtype=np.int64),
    )
    # fixtures/structure/scan_recurrence.onnx: x [5 steps, N, 8] (samples on
    # axis 1), h0 [N, 8].
    rng = np.random.default_rng(16)
    np.savez(
        os.path.join(OUT, "scan_recurrence.npz"),
        x=rng.standard_normal((5, SAMPLES, 8)).astype(np.float32),
        h0=rng.standard_normal((SAMPLES, 8)).astype(np.float32),
    )

    # fixtures/text_postnorm.onnx: input_ids [N, 8] int64 into a 50-row
    # table, attention_mask [N, 8] float (1 = attend); samples end with 0..3
    # padded positions.
    rng = np.random.default_rng(6)
    ids = rng.integers(0, 50, size=(SAMPLES, 8), dtype=np.int64)
    mask = np.ones((SAMPLES, 8), dtype=np.float32)
    for s in range(SAMPLES):
        if s:
            mask[s, 8 - s :] = 0.0
    np.savez(os.path.join(OUT, "text_postnorm.npz"), input_ids=ids, attention_mask=mask)

    # fixtures/torch/encoder_postnorm.onnx: input [1, 16] int64 into a
    # 100-row table; the fixed batch of 1 is run sample by sample.
    rng = np.random.default_rng(7)
    np.save(
        os.path.join(OUT, "encoder_postnorm.npy"),
        rng.integers(0, 100, size=(SAMPLES, 16), dtype=np.int64),
    )


if __name__ == "__main__":
    main()
