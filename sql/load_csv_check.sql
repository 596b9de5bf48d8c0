-- Read a whole CSV file once with the strict dialect of load_csv_read.sql, keeping nothing: the
-- ad-hoc commands (estimate, rake) check a file this way before polars reads it, so a ragged
-- row or a byte that is not UTF-8 is an error, never a row padded with missing values.
{% from "load_csv_read.sql" import read_csv %}
select count(*) from {{ read_csv() }}
