"""Parquet logs -> hashed CSR minibatches: ``files`` finds the input and its days, ``featurize``
hashes columns into buckets, ``stream`` yields the batches; ``examples`` is the report's observer."""

from trainer.reader.files import DataFile, discover, parse_day
from trainer.reader.stream import Batch, Part, Position, ReadCounts, Reader

__all__ = ["Batch", "DataFile", "Part", "Position", "ReadCounts", "Reader", "discover", "parse_day"]
