"""What a conversion's report says, and its JSON, HTML and Markdown forms.

:mod:`.build` makes the report (one :class:`~requant.report.model.Report`,
typed in :mod:`.model`) from the requantizer's running sums and the streaming
analysis; :mod:`.write` writes it as JSON or through :mod:`.render` (jinja2,
autoescaped) as one HTML page or Markdown, with the tables of :mod:`.tables`
and the pictures of :mod:`.plots`; :mod:`.filters` writes a shaping filter's
JSON export and |NTF| plot.
"""
