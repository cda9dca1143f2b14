-- Channels with a digest schedule take alerts below critical at the schedule's next fire
-- time, as one digest, instead of one message each. A notifying event for such a channel
-- waits here (no outbox row for that channel) until a `digest` event lists it; the event's
-- other channels are queued at once as before.
CREATE TABLE digest_wait (
    event_id        INTEGER NOT NULL REFERENCES alert_event(event_id),
    channel         TEXT NOT NULL,
    at              TEXT NOT NULL,
    digest_event_id INTEGER REFERENCES alert_event(event_id),
    PRIMARY KEY (event_id, channel)
) WITHOUT ROWID;
CREATE INDEX digest_wait_pending ON digest_wait(channel, at) WHERE digest_event_id IS NULL;
