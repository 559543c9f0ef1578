"""The one layer that knows a model, its images and inference together: table fits and voxelwise fits."""
