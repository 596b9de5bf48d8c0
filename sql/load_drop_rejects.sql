-- Forget a rejects table (wb_rejects, wb_reject_scans) of an earlier typed read: DuckDB appends to them.
drop table if exists {{ table|ident }}
