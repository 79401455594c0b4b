"""Scale-out: executors (this process, a local process pool, a Dask cluster) and the sharded object store."""
