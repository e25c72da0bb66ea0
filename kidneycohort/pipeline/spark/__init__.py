"""The spark engine: per-patient steps on partitions of patients, on Apache Spark.

``execution: {engine: spark}`` in a study config runs every partition-safe step
(:class:`~kidneycohort.pipeline.registry.PatientWise`) on partitions of patients through
the same polars code as the polars engine, and the cohort-level steps on the driver;
the run folder is the same. pyspark is imported only when a run uses this engine.
"""

from kidneycohort.pipeline.spark._plan import PartitionPlan, partition_plan

__all__ = ["PartitionPlan", "partition_plan"]
