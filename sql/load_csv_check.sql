-- Read a whole CSV file once with the strict dialect of load_csv.sql, keeping nothing: the
-- ad-hoc commands (estimate, rake) check a file this way before polars reads it, so a ragged
-- row or a byte that is not UTF-8 is an error, never a row padded with missing values.
select count(*) from read_csv(
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
