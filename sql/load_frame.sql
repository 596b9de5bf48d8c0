-- A data frame registered with the connection (an SPSS file read by pyreadstat) as a temp table
-- of text columns. rowid + 1 is the data row number.
{% from "load_text_columns.sql" import text_columns %}
create or replace temp table {{ table|ident }} as
select
    {{- text_columns(columns) }}
from {{ frame|ident }}
