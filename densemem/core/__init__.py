"""The engine: the softmax update over some set of stored rows, and nothing else.

Internal; nothing here is public API (import from :mod:`densemem`). One kernel
(:mod:`.partial`: a block's partial softmax and the exact merge), the tiled exact
pass (:mod:`.tiles`, :mod:`.exact`), candidate sources (:mod:`.candidates`:
certified and index-backed), the step loop (:mod:`.steps`), the pattern table
(:mod:`.table`) and the one faiss index factory (:mod:`.index`). The core never
imports a job package or the CLI.
"""
