"""Mail in and out: documents from mail files and folders, the IMAP intake and its UID
watermark, the SMTP door, filing and forwarding.

May import :mod:`mixture` and :mod:`state`, never :mod:`service` (the command line calls in).
"""
