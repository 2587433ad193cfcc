"""Scale-out on Dask: file scoring partition by partition, and the calibration's E-step over partitions.

Tasks read their own slice of the file (``calibration.io`` partitions) and hand back small results;
the client never holds the whole table. Imported only with ``--engine dask`` (the ``dask`` extra).
"""
