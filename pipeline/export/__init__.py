"""Export of a session store to other formats (NWB)."""

from pipeline.export.nwb import export_nwb, voxel_masks

__all__ = ["export_nwb", "voxel_masks"]
