"""Portable test vectors, for targets where Python cannot call the kernel (docs/vectors.md).

    npy.py       strict .npy v1.0 reading and writing, the stored form of each number format
    manifest.py  the manifest, its JSON Schema, and the checks a folder passes before it is scored
    export.py    `refnorm export`: inputs, the oracle's expected outputs and bounds, per case
    score.py     `refnorm score`: a target's outputs judged as `refnorm check` judges a kernel
    cli.py       the two commands (conformance.cli.EXTENSIONS)
"""
