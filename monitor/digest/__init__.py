"""The evening digest: context, render (HTML, text, PNG charts), email and mailer."""
