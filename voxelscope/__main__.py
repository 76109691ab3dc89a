"""``python -m voxelscope ...``: the same as the ``voxelscope`` command."""

import sys

from voxelscope.cli import main

sys.exit(main())
