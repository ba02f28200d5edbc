"""``stopwise report``: one self-contained HTML (or Markdown) file from a data file and
result JSON files: data summary, fit tables, comparison, figures, warnings and a
reproducibility record."""
