"""Reviewing: the stratified review queue, reading a filled sheet, and the tally of its tags."""
from slicefind.review.queue import REST, Queue, build_queue
from slicefind.review.tally import UNTAGGED, WRONG_LABEL, Combined, Tally, normalize_tag, read_reviews, tally

__all__ = ["Queue", "build_queue", "REST", "Tally", "Combined", "tally", "read_reviews", "normalize_tag",
           "UNTAGGED", "WRONG_LABEL"]
