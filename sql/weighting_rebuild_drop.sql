-- Rebuild an older `weights` table without its primary key, step 2: drop the indexed table.
drop table weights
