-- wb_text(text): a raw text value trimmed, with empty text as NULL (how every column is read).
create or replace temp macro wb_text(v) as nullif(trim(v), '')
