"""Alert rules and their state, the outbox and SMTP delivery, and the daily reports."""
