"""Finding activation sites: one small matcher per form (single ops and decomposed subgraphs), the Site record and its role."""
