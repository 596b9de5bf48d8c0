-- A CSV wave file as a temp table of text columns, exactly as written (no type guessing:
-- the checks see the raw text; empty fields are NULL). rowid + 1 is the data row number.
create or replace temp table {{ table|ident }} as
select * from read_csv($path, all_varchar = true, header = true)
