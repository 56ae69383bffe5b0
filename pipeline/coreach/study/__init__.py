"""User studies: plan a within-subject study (schedule, codes) and analyse its trials with paired statistics."""
