-- Whether the `weights` table of an older study database carries a primary key (an index).
select count(*) > 0 as indexed
from duckdb_constraints()
where table_name = 'weights' and constraint_type = 'PRIMARY KEY'
