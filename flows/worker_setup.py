"""What a Dask worker imports as it starts (Dask's worker ``preload``).

The modules whose functions the stages send to the workers. Without it a
fresh worker imports them when its first task of a stage arrives, and every
worker waits on that at the start of ingest (0.5-0.7 s on the 2-core test
machine) and again, for less, at the later stages. Local clusters preload it
(``flows.cluster.local_cluster_kwargs``), batch and Kubernetes workers get
``--preload descatter.flows.worker_setup`` on their command line, and a
worker started by hand for a scheduler profile should be given the same.
"""

from descatter.flows import apply, estimate, ingest, solve  # noqa: F401
