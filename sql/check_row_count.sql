-- empty-file: the number of data rows.
select count(*) from {{ raw|ident }}
