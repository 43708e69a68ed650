"""Topic-based Subscription notifications (HL7 Subscriptions R5 Backport IG on R4).

    topics.py    our topic canonicals, their filters, parse_subscription → SubscriptionSpec, matches()
    headers.py   channel.header strings → (name, value) pairs, refusing what must never be sent
    bundles.py   notification, $status and $events Bundles in the R4 (Parameters) and R4B forms
    backoff.py   retry schedule: capped exponential backoff with full jitter, give-up decision
    sender.py    one HTTP POST of a notification → DeliveryOutcome

Everything but sender.py is pure; the dispatcher (elsewhere) owns tables, clocks and loops.
"""
