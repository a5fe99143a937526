"""Fit engines: where a cohort model's passes over the rows run (design §9).

`memory` keeps the rows in numpy (small readouts); `duckdb` aggregates the readout's Parquet files
embedded and out of core; `spark` runs the same aggregations on a Spark cluster. The statistics
receive an engine as an argument (`service.stats.pushdown.RowEngine`) and never import this
package.
"""
