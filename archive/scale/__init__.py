"""Beyond one machine: moving an archive to a company catalogue and fanning work out.

``migrate`` copies an archive to another catalog database and object store, verified at
both ends; ``distributed`` runs independent partitions of a job on Dask distributed (or in
this process) and returns their results in partition order.
"""
