-- Names and types of the columns of a table in the main database.
select column_name, data_type
from information_schema.columns
where table_schema = 'main' and table_name = $table
order by ordinal_position
