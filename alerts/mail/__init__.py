"""Email: composing messages, and the store-and-forward outbox with SMTP delivery."""
