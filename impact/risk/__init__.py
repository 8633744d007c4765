"""The risk stage: options run on the ensemble, per-member summaries, the metrics, paired effects."""
