"""Matching: vectors, the index, and the answer to "which images are copies of this one".

Embedding the catalog, locally or on a cluster (vectors, cluster), region descriptors and kept
keypoints (regions, keypoints), the FAISS index and its spec (index, index_spec), whitening
(whiten), reading a published generation (generations), the query with its score normalisation,
frame views, fusion with a classical descriptor and geometric verification (query, frames, fusion,
rerank, verify, pair_verify), the query-side duplicate verdict (query_verdict), and grouping
without chaining (groups).
"""
