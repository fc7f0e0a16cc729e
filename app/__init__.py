"""Ventcast faces: the command line and (later) the Qt window."""

CAUTION = ("Caution: model estimate for decision support, not a medical device. Confirm with measured "
           "blood gases; follow local protocols and the judgement of licensed clinicians.")
