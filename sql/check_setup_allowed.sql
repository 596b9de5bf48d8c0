-- wb_allowed: the valid codes of each coded column ('0' and '1' for multi items), as text.
create or replace temp table wb_allowed as
select * from {{ frame|ident }}
