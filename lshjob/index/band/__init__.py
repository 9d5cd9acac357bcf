"""Band stage: representatives' signatures -> rows of shared buckets (the seam in ``base``)."""

from lshjob.index.band.base import BAND_MULTIPLIER, BUCKET_ROWS_SCHEMA, BandEngine, BandOutput, save_keys
from lshjob.index.band.local import ROW_BYTES, LocalBand, bands_per_batch

__all__ = ["BAND_MULTIPLIER", "BUCKET_ROWS_SCHEMA", "ROW_BYTES", "BandEngine", "BandOutput", "LocalBand",
           "bands_per_batch", "save_keys"]
