-- What the typed read of load_csv.sql skipped: every rejected line, and the columns whose values
-- did not convert (error type CAST; any other type is a structural error of the file).
select
    count(*) as lines,
    count(*) filter (where error_type <> 'CAST') as structural,
    coalesce(list(distinct column_name) filter (where error_type = 'CAST'), []) as columns
from wb_rejects
