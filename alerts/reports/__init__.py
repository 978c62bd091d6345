"""Daily reports: the report model, its charts and its rendering to HTML and email."""
