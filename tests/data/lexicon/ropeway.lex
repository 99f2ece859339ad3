# Ropeway announcements: word, then phones.
cabin     k a b i n
car       k a r
cart      k a r t
doors     d o r s
tower     t a u e r
gondola   g o n d o l a
summit    s u m i t
station   s t e i s o n
ride      r a i d
rode      r o u d
road      r o u d
low       l o u
lo        l o u
to        t u
two       t u
too       t u
