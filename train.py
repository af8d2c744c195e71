#!/usr/bin/env python
"""Train an encoder: ``python train.py [CONFIG] [--set key=value ...]`` is ``twinpatch train ...``.

With no argument it runs the demo: it generates the synthetic demo cohort into ``demo_data/`` if
needed, trains with the built-in demo configuration (``configs/demo.toml``), exports
``runs/demo/encoder.safetensors`` and writes the embedding map of one demo case.
"""

import sys

from embed.cli import main

if __name__ == "__main__":
    sys.exit(main(["train", *sys.argv[1:]]))
