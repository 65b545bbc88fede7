"""Paging people: notification channels (SMTP, signed webhooks, HL7 v2 over MLLP), the
delivery outbox in the journal, failing channels as technical alarms, and signed
acknowledgement links. Shell side: the engine never imports this package."""
