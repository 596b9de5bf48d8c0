-- A CSV wave file as a temp table of text columns, exactly as written (no type guessing:
-- the checks see the raw text; empty fields are NULL). rowid + 1 is the data row number.
-- The dialect is fixed (comma, double quotes, a header line) and strict: a row with more or
-- fewer fields than the header is an error, never padded or read as one wide column. The
-- column names come from the header as pipeline.readers read it ($columns: name -> VARCHAR).
create or replace temp table {{ table|ident }} as
select * from read_csv(
    $path,
    auto_detect = false,
    header = true,
    delim = ',',
    quote = '"',
    escape = '"',
    strict_mode = true,
    null_padding = false,
    columns = $columns
)
