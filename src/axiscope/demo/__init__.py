"""The invented demo cohort (:mod:`.cohort`) and the demo's data layout (:mod:`.layout`)."""
