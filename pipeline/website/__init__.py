"""The site stage: figures, funnel limits, words, pages and the renderers."""
