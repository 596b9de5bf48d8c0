-- A Parquet wave file as a temp table of text columns.
{% from "load_text_columns.sql" import text_columns %}
create or replace temp table {{ table|ident }} as
select
    {{ text_columns(columns) }}
from read_parquet($path)
