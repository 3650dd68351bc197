station,tmax
A,12.5
