"""Names the command line offers before anything heavy is imported (kept free of numpy,
pandas and scipy so that ``tracker --help`` starts at once)."""

#: Multiple-comparison adjustments, by option value.
ADJUST_METHODS = {
    "bh": "Benjamini-Hochberg false discovery rate",
    "holm": "Holm family-wise error rate",
    "by": "Benjamini-Yekutieli false discovery rate",
    "none": "no adjustment",
}

#: Output formats of the table commands.
FORMATS = ("table", "csv", "json", "md")

#: Rules for a stratum holding a single cluster (codebook key single_cluster_strata).
SINGLE_CLUSTER_RULES = {
    "centre": "the lone cluster is compared with the mean of all clusters (svy 'center')",
    "average": "the stratum gets the average contribution of the other strata (svy 'scale')",
    "certainty": "the stratum adds nothing: it was taken with certainty (svy 'skip', samplics 'skip')",
    "refuse": "estimation is refused while such a stratum exists",
}
