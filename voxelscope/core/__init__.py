"""Pure numerical core of voxelscope: numpy, scipy and nibabel only, never Qt."""
