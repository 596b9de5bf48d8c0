-- A CSV wave file as a temp table of text columns (no type guessing: the checks see the raw text).
{% from "load_text_columns.sql" import text_columns %}
create or replace temp table {{ table|ident }} as
select
    {{ text_columns(columns) }}
from read_csv($path, all_varchar = true, header = true)
