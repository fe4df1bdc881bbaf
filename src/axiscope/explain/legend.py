"""The meaning of every section and column of the axis cards, one sentence each.

The same sentences head the long TSV (as ``#`` comment lines), travel inside the JSON, and
close every per-axis page, so that a reader is never more than one sentence away from what
a number means.
"""

from __future__ import annotations

__all__ = ["SECTIONS", "COLUMNS", "RECORD_COLUMNS", "CARDS_FORMAT", "CARDS_VERSION", "header_lines"]

#: Name and version of the record set's layout (``axis_cards.tsv`` / ``axis_cards.json``).
CARDS_FORMAT = "axiscope axis cards"
CARDS_VERSION = 1

#: Sections of the record set, in the order they appear for each axis.
SECTIONS = {
    "carries": "how much of the data's variance the axis carries",
    "reading": "a one-line plain-language reading of the axis (associations only, never causes)",
    "warning": "raised when a technical annotation explains more of the axis than any other annotation, "
               "the usual sign of a batch effect",
    "built_from": "the features with the largest positive and the largest negative loadings, i.e. what the "
                  "axis is a weighted sum of",
    "lines_up": "every sample annotation, numeric or categorical, ranked by the share of the axis's variance "
                "it explains (R²)",
    "category": "for a categorical annotation, how far each category's mean score sits above or below the "
                "mean of all samples",
    "end": "the samples with the highest (positive end) and lowest (negative end) scores",
    "off_axis": "the samples the axis represents poorly: little of their distance from the centre lies "
                "along this axis (smallest squared cosine)",
    "annotation_use": "how each annotation column was treated (numeric or categorical), or why it was "
                      "skipped, and how to change that; not tied to an axis",
}

#: Every column of the record set, with its meaning.
COLUMNS = {
    "axis": "the principal component (PC1 is the one carrying most variance); empty for annotation_use rows",
    "section": "which part of the axis card the row belongs to (see the sections above)",
    "side": "positive or negative: the sign of the loading (built_from), of the score (end) or of the "
            "category's deviation from the mean (category)",
    "rank": "position within the axis, section and side, 1 being the most extreme",
    "feature_id": "the feature (column of the input matrix)",
    "sample_id": "the sample (row of the input matrix)",
    "annotation": "the sample annotation column",
    "category": "one value of a categorical annotation",
    "supplementary": "true for a feature or sample that did not help build the axes and was placed on "
                     "them afterwards",
    "technical": "true for an annotation marked as technical (batch, run, depth, quality ...)",
    "treated_as": "numeric (values are numbers) or categorical (values name groups)",
    "n": "number of samples counted: those with a value of the annotation (lines_up, annotation_use) or "
         "the members of the category (category)",
    "n_missing": "samples without a value of the annotation",
    "n_categories": "number of distinct categories of a categorical annotation",
    "used": "whether the annotation column was analysed",
    "variance": "variance of the axis's scores (s²/n)",
    "variance_ratio": "share of the total variance of the preprocessed data carried by the axis (a fraction "
                      "of 1; the pages show it in percent)",
    "cumulative_ratio": "share of the total variance carried by this axis and all before it (a fraction of 1; "
                        "the pages show it in percent)",
    "above_noise": "whether the axis is among those the fit found above the noise level (the recommended "
                   "number of signal_axes.tsv, from fit --components auto or --assess-signal); empty (null) "
                   "when not assessed",
    "stability": "split-half stability of the axis: median, over random splits of the samples into two halves, "
                 "of the absolute cosine between the two halves' loading vectors matched to this axis (0–1); "
                 "empty when not assessed (fit --stability-repeats)",
    "stable": "whether the stability reaches the threshold in the fit's manifest (0.8 by default); empty "
              "when not assessed",
    "loading": "weight of the feature in the axis (unit-length direction; supplementary features in the "
               "same units)",
    "correlation": "Pearson correlation with the axis's scores: of the feature (built_from) or of a numeric "
                   "annotation (lines_up)",
    "contribution_pct": "percent of the axis's variance built from this feature or sample (sums to 100 "
                        "over those that built the axis; empty for supplementary ones)",
    "sq_cosine": "squared cosine (quality of representation): share of the feature's or sample's squared "
                 "length that lies along this axis (0–1)",
    "score": "the sample's coordinate on the axis",
    "r_squared": "share of the axis's variance explained by the annotation: r² for a numeric annotation, "
                 "η² (between-category share) for a categorical one",
    "f_statistic": "F statistic of that fit (explained against unexplained variance, per degree of freedom)",
    "df_between": "degrees of freedom of the fit: 1 for a numeric annotation, categories − 1 for a "
                  "categorical one",
    "df_within": "residual degrees of freedom: n − 1 − df_between",
    "category_mean": "mean score of the category's samples on the axis",
    "overall_mean": "mean score of all samples with a value of the annotation",
    "z": "z-score of the category's mean against the overall mean, as if its members were drawn at "
         "random without replacement from the samples (finite-population correction)",
    "p_value": "p-value of the test of the row (t-test of a correlation, F-test of R², or normal test of z); "
               "stored as 0 where it underflows below about 1e-300, shown as '< 1e-300' on the pages",
    "p_adjusted": "Benjamini–Hochberg adjusted p-value: over all features of the axis (built_from), over "
                  "all annotations × axes (lines_up), over all categories × axes (category)",
    "text": "the reading or the warning in words, or the note on how an annotation was treated",
}

#: Columns of the long record set, in order.
RECORD_COLUMNS = list(COLUMNS)


def header_lines() -> list[str]:
    """Comment lines that head ``axis_cards.tsv`` (without the leading ``# ``)."""
    lines = [f"{CARDS_FORMAT}, layout version {CARDS_VERSION}: one row per record; lines starting with '#' "
             "precede the header and describe the columns.",
             "Associations only: these statistics do not show what causes an axis.",
             "", "Sections:"]
    lines += [f"  {name}: {meaning}" for name, meaning in SECTIONS.items()]
    lines += ["", "Columns (empty where a column does not apply to a section):"]
    lines += [f"  {name}: {meaning}" for name, meaning in COLUMNS.items()]
    return lines
